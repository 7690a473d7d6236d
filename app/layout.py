"""Page structure: header with caution, data and roles, analysis choices, the views.

Pure functions from start-up defaults to components; no data are read here.
"""
from __future__ import annotations

from dash import dash_table, dcc, html

from analysis import options as opt
from analysis.settings import Settings

from . import controls as ctl
from . import ids
from .urlstate import LINE_ORDERS, MAX_DRAW, VIEW_DEFAULTS

CAUTION = ("Exploratory research statistics — not for individual care decisions. "
           "Use de-identified data under your institution's approvals.")

#: modebar: camera button saves PNG (2x); the SVG button beside each view saves SVG
GRAPH_CONFIG = {
    "displaylogo": False,
    "toImageButtonOptions": {"format": "png", "scale": 2},
    "modeBarButtonsToRemove": ["lasso2d", "select2d"],
}

SECTIONS = (
    ("section-data", "Data & roles"),
    ("section-kept", "Who is analysed"),
    ("section-course", "Courses over time"),
    ("section-spread", "Spread by time apart"),
    ("section-pairs", "Visit-to-visit correlation"),
    ("section-lines", "Subject lines"),
    ("section-rate", "Rate of change vs covariate"),
    ("section-follow", "Follow-up & loss"),
    ("section-models", "Models"),
)


def build_layout(settings: Settings, *, max_upload_bytes: int | None = None) -> html.Div:
    """The whole page, controls showing ``settings`` until the link or the user changes them;
    the upload refuses files over ``max_upload_bytes`` (default: what the server accepts)."""
    return html.Div(className="cl-page", children=[
        dcc.Location(id=ids.PAGE_URL, refresh=False),
        dcc.Store(id=ids.STORE_DATA),
        dcc.Store(id=ids.STORE_ROLES),
        dcc.Store(id=ids.STORE_SETTINGS),
        dcc.Store(id=ids.STORE_SUBJECT),
        *[dcc.Store(id=v) for v in ids.VIEW_RENDERED.values()],
        header(),
        html.Div(className="cl-body", children=[
            html.Aside(settings_panel(settings), className="cl-side"),
            html.Main(className="cl-main", children=[
                html.Div(id=ids.PAGE_ALERT, className="cl-alert", role="status"),
                data_section(settings, max_upload_bytes),
                kept_section(),
                selection_bar(),
                course_section(),
                spread_section(),
                pairs_section(),
                lines_section(),
                rate_section(),
                follow_section(),
                models_section(),
                html.Footer(CAUTION, className="cl-foot"),
            ]),
        ]),
    ])


def header() -> html.Header:
    return html.Header(className="cl-head", children=[
        html.Div(className="cl-brand", children=[
            html.Span("cohortlens", className="cl-logo"),
            html.H1(id=ids.PAGE_TITLE, children="—"),
        ]),
        html.Nav(className="cl-nav", children=[
            html.A(label, href=f"#{anchor}") for anchor, label in SECTIONS]),
        html.Div(id=ids.PAGE_CAUTION, className="cl-caution", role="note", children=[
            html.Span("Caution", className="cl-caution-tag"),
            html.Span(CAUTION),
            html.Button("Hide", id=ids.PAGE_CAUTION_CLOSE, className="cl-btn cl-btn-quiet",
                        title="Hide this note (it stays in the page footer)"),
        ]),
    ])


# ------------------------------------------------------------------ helpers
def section(anchor: str, title: str, intro: str | None, *children, extra_class: str = ""):
    return html.Section(id=anchor, className=f"cl-section {extra_class}".strip(), children=[
        html.H2(title),
        *([html.P(intro, className="cl-intro")] if intro else []),
        *children,
    ])


def message(id_: str) -> html.Div:
    return html.Div(id=id_, className="cl-msg", role="alert")


def graph(id_: str, height: int = 460) -> html.Div:
    """A graph with a loading indicator (after 0.5 s) and an SVG export button."""
    return html.Div(className="cl-graph", children=[
        html.Button("SVG", id={"type": ids.EXPORT_SVG, "index": id_},
                    className="cl-btn cl-btn-quiet cl-svg",
                    title="Save this figure as SVG (the camera icon saves PNG)"),
        dcc.Loading(type="circle", delay_show=500, children=dcc.Graph(
            id=id_, config=GRAPH_CONFIG, style={"height": f"{height}px"},
            figure={"data": [], "layout": {"xaxis": {"visible": False},
                                           "yaxis": {"visible": False}}})),
    ])


def busy(*children) -> dcc.Loading:
    """A loading indicator (after 0.5 s) around output that a slow step fills."""
    return dcc.Loading(type="dot", delay_show=500, children=list(children))


def field(label: str, control, msg_id: str, hint: str | None = None) -> html.Div:
    return html.Div(className="cl-field", children=[
        html.Label(label, className="cl-label"),
        control,
        *([html.Small(hint, className="cl-hint")] if hint else []),
        message(msg_id),
    ])


def number(id_: str, value, *, step="any", min_=None, placeholder=None) -> dcc.Input:
    return dcc.Input(id=id_, type="number", value=value, step=step, min=min_, debounce=True,
                     placeholder=placeholder, className="cl-input")


# ------------------------------------------------------------------ data section
def upload_box(max_bytes: int | None = None) -> html.Div:
    """The upload area with its size limit said beside it. Files over the limit are refused in
    the browser before sending (``max_size``); assets/upload_limit.js reads the limit and the
    message from the data attributes here and shows it under the control."""
    from .datastore import size_text, upload_limit

    max_bytes = upload_limit() if max_bytes is None else int(max_bytes)
    limit = size_text(max_bytes)
    too_large = (f"{{name}} is {{size}}; the page accepts files up to {limit}. Start the app "
                 "with the file instead (it is then read from disk, with no size limit): "
                 "cohortlens serve FILE")
    return html.Div(className="cl-upload-box", **{
        "data-max-bytes": str(max_bytes), "data-msg-id": ids.DATA_UPLOAD_MSG,
        "data-too-large": too_large}, children=[
        dcc.Upload(id=ids.DATA_UPLOAD, className="cl-upload", multiple=False, max_size=max_bytes,
                   accept=".csv,.tsv,.txt,.parquet,.pq",
                   children=html.Div(["Drop a file here or ",
                                      html.Span("choose one", className="cl-link")])),
        html.Div(id=ids.DATA_UPLOAD_LIMIT, className="cl-hint",
                 children=f"Files up to {limit}. Larger files: cohortlens serve FILE"),
    ])


def data_section(settings: Settings | None = None,
                 max_upload_bytes: int | None = None) -> html.Section:
    role_rows = [
        ("subject", "Subject identifier", False, None),
        ("time", "Time or visit date", False,
         "Numbers (time since the origin) or calendar dates."),
        ("event_date", "Event date (time origin)", False,
         "Optional: the per-subject anchoring date, e.g. transplant date."),
        ("response", "Response (measured repeatedly)", False, None),
        ("covariates", "Baseline covariates", True,
         "The first is the primary one unless chosen otherwise under Analysis choices."),
        ("followup_end", "End of follow-up (optional)", False,
         "Per subject: when its follow-up was due to end (date or time), so that leaving early "
         "is told apart from the end of the data."),
    ]
    return section("section-data", "Data & column roles",
                   "Upload a CSV or Parquet table with one row per visit. It is read in memory "
                   "on this computer and never saved to disk.",
                   html.Div(className="cl-data-row", children=[
                       upload_box(max_upload_bytes),
                       html.Div(className="cl-data-meta", children=[
                           html.Div(id=ids.DATA_NAME, className="cl-data-name"),
                           html.Button("Use the demo registry", id=ids.DATA_USE_DEMO,
                                       className="cl-btn cl-btn-quiet"),
                       ]),
                   ]),
                   message(ids.DATA_UPLOAD_MSG),
                   html.Div(className="cl-roles", children=[
                       *[field(label, dcc.Dropdown(id=ids.ROLE_INPUT[r], multi=multi, options=[],
                                                   placeholder="choose a column…",
                                                   clearable=True),
                               ids.ROLE_MSG[r], hint)
                         for r, label, multi, hint in role_rows[:2]],
                       # read with the time role: how year-last dates in the time and
                       # event-date columns are read
                       field(ctl.FIELD_LABELS["date_order"],
                             dcc.Dropdown(id=ids.SETTING_INPUT["date_order"],
                                          options=ctl.choice_options(ctl.DATE_ORDER_LABELS),
                                          value=(settings or Settings()).date_order,
                                          clearable=False, searchable=False),
                             ids.SETTING_MSG["date_order"],
                             "For dates with the year last, e.g. 03/04/2021."),
                       *[field(label, dcc.Dropdown(id=ids.ROLE_INPUT[r], multi=multi, options=[],
                                                   placeholder="choose a column…",
                                                   clearable=True),
                               ids.ROLE_MSG[r], hint)
                         for r, label, multi, hint in role_rows[2:]]]),
                   html.Div(id=ids.ROLES_STATUS, className="cl-status"),
                   html.Details(className="cl-preview", open=True, children=[
                       html.Summary("First rows of the table"),
                       busy(dash_table.DataTable(id=ids.DATA_PREVIEW, page_size=6,
                                                 style_table={"overflowX": "auto"},
                                                 style_cell={"fontFamily": "inherit",
                                                             "fontSize": "15px",
                                                             "padding": "4px 8px"},
                                                 style_header={"fontWeight": "600"})),
                   ]))


# ------------------------------------------------------------------ settings panel
def settings_panel(settings: Settings) -> html.Div:
    v = ctl.control_values(settings)
    lab = ctl.FIELD_LABELS
    S, M = ids.SETTING_INPUT, ids.SETTING_MSG

    def dd(f, options, clearable=False, placeholder=None):
        return dcc.Dropdown(id=S[f], options=options, value=v[f], clearable=clearable,
                            searchable=False, placeholder=placeholder)

    def check(f, text):
        return dcc.Checklist(id=S[f], options=[{"label": text, "value": ctl.ON}], value=v[f],
                             className="cl-check")

    group = lambda title, *children: html.Fieldset(className="cl-group", children=[  # noqa: E731
        html.Legend(title), *children])
    return html.Div(className="cl-settings", children=[
        html.H2("Analysis choices"),
        html.Div(id=ids.SETTINGS_STATUS, className="cl-status"),
        message(ids.SETTINGS_DATA_MSG),
        group("Time",
              field(lab["origin"], dd("origin", ctl.choice_options(ctl.ORIGIN_LABELS)), M["origin"]),
              field(lab["unit"], dd("unit", [{"label": u, "value": u} for u in opt.UNITS]),
                    M["unit"]),
              html.Div(className="cl-pair", children=[
                  field(lab["time_min"], number(S["time_min"], v["time_min"],
                                                placeholder="start"), M["time_min"]),
                  field(lab["time_max"], number(S["time_max"], v["time_max"],
                                                placeholder="end"), M["time_max"]),
              ]),
              field(lab["duplicates"], dd("duplicates", ctl.choice_options(ctl.DUPLICATE_LABELS)),
                    M["duplicates"]),
              field(lab["data_cut"], dcc.Input(id=S["data_cut"], type="text", value=v["data_cut"],
                                               debounce=True, placeholder="latest visit date",
                                               className="cl-input"),
                    M["data_cut"], "YYYY-MM-DD: when the data end, for loss to follow-up.")),
        group("Inclusion",
              field(lab["min_visits"], number(S["min_visits"], v["min_visits"], step=1, min_=1),
                    M["min_visits"]),
              field("", check("require_covariate", "Drop subjects without the baseline covariate"),
                    M["require_covariate"])),
        group("Baseline covariate",
              field(lab["covariate"], dd("covariate", [], clearable=True,
                                         placeholder="first covariate"), M["covariate"]),
              field(lab["transform"], dd("transform", ctl.choice_options(ctl.TRANSFORM_LABELS)),
                    M["transform"]),
              field(lab["center"], html.Div(className="cl-pair", children=[
                  dd("center", ctl.choice_options(ctl.CENTER_CHOICES)),
                  number(ids.SETTING_CENTER_VALUE, v["center_value"], placeholder="value"),
              ]), M["center"], "On the transformed scale.")),
        group("Groups (strata)",
              field(lab["stratify_by"], dd("stratify_by", [], clearable=True,
                                           placeholder="the baseline covariate"),
                    M["stratify_by"]),
              field(lab["strata_method"], dcc.RadioItems(
                  id=S["strata_method"], options=ctl.choice_options(ctl.STRATA_METHOD_LABELS),
                  value=v["strata_method"], className="cl-radio"), M["strata_method"]),
              field(lab["n_strata"], number(S["n_strata"], v["n_strata"], step=1, min_=1),
                    M["n_strata"]),
              html.Div(id=ids.STRATA_SIZE_NOTE, className="cl-warn-note", role="status"),
              field(lab["breaks"], dcc.Input(id=S["breaks"], type="text", value=v["breaks"],
                                             debounce=True, placeholder="e.g. 10, 20, 40",
                                             className="cl-input"),
                    M["breaks"], "Inner cut points in the covariate's own units.")),
        group("Residuals (for spread and correlation)",
              field(lab["detrend"], dd("detrend", ctl.choice_options(ctl.DETREND_LABELS)),
                    M["detrend"]),
              html.Div(className="cl-pair", children=[
                  field(lab["spline_df"], number(S["spline_df"], v["spline_df"], step=1, min_=1),
                        M["spline_df"]),
                  field(lab["lowess_frac"], number(S["lowess_frac"], v["lowess_frac"],
                                                   min_=0.01), M["lowess_frac"]),
              ]),
              field("", check("detrend_within_strata", "Separate mean curve for each group"),
                    M["detrend_within_strata"])),
        group("Spread and correlation views",
              html.Div(className="cl-pair", children=[
                  field(lab["variogram_bins"], number(S["variogram_bins"], v["variogram_bins"],
                                                      step=1, min_=1), M["variogram_bins"]),
                  field(lab["variogram_max_lag"], number(S["variogram_max_lag"],
                                                         v["variogram_max_lag"],
                                                         placeholder="all"),
                        M["variogram_max_lag"]),
              ]),
              field(lab["lag_width"], number(S["lag_width"], v["lag_width"], placeholder="auto"),
                    M["lag_width"], "Width of each time-apart window, in time units.")),
        html.Button("Back to start-up choices", id=ids.SETTINGS_RESET, className="cl-btn"),
    ])


# ------------------------------------------------------------------ views
def kept_section():
    return section("section-kept", "Who is analysed",
                   "What each inclusion step removed, in order.",
                   busy(dash_table.DataTable(id=ids.KEPT_TABLE, style_as_list_view=True,
                                        style_cell={"fontFamily": "inherit", "fontSize": "16px",
                                                    "padding": "6px 10px", "textAlign": "right"},
                                        style_cell_conditional=[{"if": {"column_id": "step"},
                                                                 "textAlign": "left"}],
                                        style_header={"fontWeight": "600"})),
                   html.Ul(id=ids.KEPT_NOTES, className="cl-notes"))


def selection_bar():
    """The compact sticky groups bar: chips and clear button on one line, then the hint
    (beside them when there is room) or the followed subject's card."""
    hint = "Click a subject in any view to follow it everywhere."
    return html.Div(className="cl-selection", title=hint, children=[
        html.Div(className="cl-selection-row", children=[
            html.Span("Groups:", className="cl-label",
                      title="Choose a group to highlight it in every view"),
            dcc.RadioItems(id=ids.LINK_STRATA, options=[], value=None, className="cl-chips",
                           inline=True),
            html.Button("Clear highlight", id=ids.LINK_CLEAR, className="cl-btn cl-btn-quiet",
                        title="Clear the highlighted group and subject"),
            html.Div(className="cl-card-slot", children=busy(
                html.Div(id=ids.LINK_CARD, className="cl-card",
                         children=html.Span(hint, className="cl-hint")))),
        ]),
    ])


def course_section():
    return section("section-course", "Courses over time, by group",
                   "One panel per group; a reproducible random sample of subjects is drawn "
                   "in each, with the group's smoothed mean.",
                   html.Div(className="cl-view-controls", children=[
                       html.Label("Subjects drawn per group", className="cl-label"),
                       number(ids.COURSE_DRAW, VIEW_DEFAULTS["draw"], step=1, min_=1),
                       html.Label("Sample number", className="cl-label"),
                       number(ids.COURSE_SEED, VIEW_DEFAULTS["seed"], step=1, min_=1),
                       html.Span(id=ids.COURSE_NOTE, className="cl-note"),
                   ]),
                   message(ids.COURSE_MSG),
                   graph(ids.COURSE_GRAPH, 560))


def spread_section():
    return section("section-spread", "Spread of residual differences by time apart",
                   "Empirical semivariogram of residuals after removing the mean curve: half "
                   "the mean squared difference between two visits of the same subject, by "
                   "how far apart in time they were.",
                   message(ids.SPREAD_MSG),
                   graph(ids.SPREAD_GRAPH, 460),
                   html.Div(id=ids.SPREAD_READOUT, className="cl-readout"))


def pairs_section():
    return section("section-pairs", "Correlation between a subject's visits",
                   "Residual correlation between visits that fall in two time windows; each "
                   "cell shows how many within-subject pairs it rests on.",
                   message(ids.PAIRS_MSG),
                   graph(ids.PAIRS_GRAPH, 560),
                   html.Div(id=ids.PAIRS_NOTE, className="cl-note"))


def lines_section():
    return section("section-lines", "Each subject's own straight line",
                   "Least-squares intercept and slope per subject with 95% intervals "
                   "(subjects with two visits have no interval).",
                   html.Div(className="cl-view-controls", children=[
                       html.Label("Order subjects by", className="cl-label"),
                       dcc.RadioItems(id=ids.LINES_ORDER, inline=True, className="cl-radio",
                                      value=VIEW_DEFAULTS["order"],
                                      options=[{"label": o, "value": o} for o in LINE_ORDERS]),
                   ]),
                   message(ids.LINES_MSG),
                   graph(ids.LINES_GRAPH, 620))


def rate_section():
    return section("section-rate", "Rate of change and the baseline covariate",
                   "Per-subject slopes by group, and against the covariate with a lowess "
                   "smooth. A first look only: the model section gives the adjusted answer.",
                   message(ids.RATE_MSG),
                   html.Div(className="cl-two", children=[
                       graph(ids.RATE_STRATA_GRAPH, 440),
                       graph(ids.RATE_COVARIATE_GRAPH, 440),
                   ]),
                   dash_table.DataTable(id=ids.RATE_TABLE, style_as_list_view=True,
                                        merge_duplicate_headers=True,
                                        style_cell={"fontFamily": "inherit", "fontSize": "15px",
                                                    "padding": "4px 10px"},
                                        style_header={"fontWeight": "600"}))


def follow_section():
    return section("section-follow", "Visits and loss to follow-up",
                   "How many visits each subject has, and when subjects leave the data, by group.",
                   message(ids.FOLLOW_MSG),
                   graph(ids.FOLLOW_VISITS_GRAPH, 380),
                   graph(ids.FOLLOW_DROPOUT_GRAPH, 500),
                   html.Div(id=ids.FOLLOW_NOTE, className="cl-readout"))


def models_section():
    from .sections.models import models_section as build  # the view module imports this one

    return build()


__all__ = ["build_layout", "GRAPH_CONFIG", "CAUTION", "MAX_DRAW"]
