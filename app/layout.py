"""Page structure: header with caution, the analysis choices and the sections in page order.

Pure functions from start-up defaults to components; no data are read here. Each section's
own part of the page is its module's ``layout`` (:mod:`app.sections`).
"""
from __future__ import annotations

from dash import dcc, html

from analysis import options as opt
from analysis.settings import Settings

from . import controls as ctl
from . import ids
from .components import GRAPH_CONFIG, busy, field, graph, message, number, section  # noqa: F401
from .sections import SECTIONS as PAGE_SECTIONS
from .urlstate import MAX_DRAW

CAUTION = ("Exploratory research statistics — not for individual care decisions. "
           "Use de-identified data under your institution's approvals.")

#: (anchor, navigation label) of each section with an entry, in page order
SECTIONS = tuple((m.ANCHOR, m.NAV) for m in PAGE_SECTIONS if m.NAV)


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
                *[m.layout(settings, max_upload_bytes) for m in PAGE_SECTIONS],
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
            html.A(m.NAV, href=f"#{m.ANCHOR}") for m in PAGE_SECTIONS if m.NAV]),
        html.Div(id=ids.PAGE_CAUTION, className="cl-caution", role="note", children=[
            html.Span("Caution", className="cl-caution-tag"),
            html.Span(CAUTION),
            html.Button("Hide", id=ids.PAGE_CAUTION_CLOSE, className="cl-btn cl-btn-quiet",
                        title="Hide this note (it stays in the page footer)"),
        ]),
    ])


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


__all__ = ["build_layout", "GRAPH_CONFIG", "CAUTION", "MAX_DRAW", "SECTIONS"]
