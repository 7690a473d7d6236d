"""Models section: choose candidate covariance structures, fit on request, compare, read the answer.

Fitting is explicit (a button) because it can take seconds. The fitted set is
cached in the app's :class:`~analysis.pipeline.Workbench` under the data, the
cohort's settings and the :class:`~analysis.models.modelstage.ModelChoices`, so
re-drawing, choosing another model's details or exporting the report never
refits. The browser keeps only a small snapshot of what was fitted (keys and
choices).
"""
from __future__ import annotations

import re

import pandas as pd
from dash import Input, Output, State, dash_table, dcc, html, no_update

from analysis.numbers import format_number
from analysis.errors import ModelError
from analysis.preparation.loading import fingerprint
from analysis.models.modelstage import CHOICE_FIELDS, ModelChoices
from analysis.pipeline import Workbench
from analysis.settings import json_key
from analysis.output.report import (ASSOCIATION_NOTE, CAUTIONS, MIXTURE_NOTE, PREFERRED_RULE,
                             build_report, model_tables, p_phrase, x_description)

from .. import ids
from ..components import GRAPH_CONFIG, message, section
from ..figures import (OVERLAY_CAPTION, cohort_look, empty_figure, fitted_variogram_figure,
                       report_figures)
from ..session import AppContext, NeedsInput, attempt
from ..views import on_cluster
from ..text import option

#: (structure, label) in the order offered (from the structures table); every structure
#: includes measurement error
STRUCTURE_CHOICES: tuple[tuple[str, str], ...] = CHOICE_FIELDS["structures"].options()
START_STRUCTURES = ModelChoices().structures
ANCHOR = "section-models"
NAV = "Models"

CONTROLS_GRID = {"display": "grid", "gap": "0.5rem 2.5rem", "alignItems": "start",
                 "gridTemplateColumns": "repeat(auto-fit, minmax(18rem, 1fr))"}
CHECK_COLUMN = {"display": "grid", "gridTemplateColumns": "1fr", "gap": "0.35rem"}

TABLE_STYLE = dict(
    style_table={"overflowX": "auto"},
    style_cell={"fontFamily": "inherit", "fontSize": "15px", "padding": "4px 10px",
                "textAlign": "left", "whiteSpace": "normal", "height": "auto",
                "maxWidth": "28rem"},
    style_header={"fontWeight": "600"},
    style_as_list_view=True,
)


# ------------------------------------------------------------------ layout
def layout(settings=None, max_upload_bytes=None) -> html.Section:
    return models_section()


def models_section() -> html.Section:
    """Controls, the Fit button, the results area (filled after fitting) and the report export."""
    f, start = CHOICE_FIELDS, ModelChoices()
    spline = f["time_spline_df"]
    controls = html.Div(className="cl-model-controls", style=CONTROLS_GRID, children=[
        html.Div(className="cl-field", children=[
            html.Label(f["structures"].label, className="cl-label"),
            dcc.Checklist(id=ids.MODELS_STRUCTURES,
                          value=list(start.structures),
                          options=[{"label": lab, "value": s}
                                   for s, lab in f["structures"].options()],
                          inline=True, style=CHECK_COLUMN),
        ]),
        html.Div(className="cl-field", children=[
            html.Label(f["correlation"].label, className="cl-label"),
            dcc.RadioItems(id=ids.MODELS_CORRELATION, inline=True, className="cl-radio",
                           value=start.correlation,
                           options=[{"label": lab, "value": v}
                                    for v, lab in f["correlation"].options()]),
            html.Label(f["method"].label, className="cl-label"),
            dcc.RadioItems(id=ids.MODELS_METHOD, inline=True, className="cl-radio",
                           value=start.method,
                           options=[{"label": lab, "value": v}
                                    for v, lab in f["method"].options()]),
            html.Small("REML for variance estimates; ML to compare different mean models.",
                       className="cl-hint"),
        ]),
        html.Div(className="cl-field", children=[
            html.Label(f["confounders"].label, className="cl-label"),
            dcc.Dropdown(id=ids.MODELS_CONFOUNDERS, multi=True, options=[],
                         value=list(start.confounders), placeholder="none"),
            html.Label(spline.label, className="cl-label"),
            dcc.Input(id=ids.MODELS_SPLINE_DF, type="number", min=spline.limits[0],
                      max=spline.limits[1], step=1, value=start.time_spline_df,
                      debounce=True, placeholder="straight line", className="cl-input",
                      style={"maxWidth": "12rem"}),
        ]),
    ])
    buttons = html.Div(className="cl-view-controls", children=[
        html.Button("Fit models", id=ids.MODELS_FIT, className="cl-btn"),
        html.Button("Export report", id=ids.MODELS_EXPORT, className="cl-btn cl-btn-quiet",
                    title="Download everything on this page as one HTML file"),
        dcc.Download(id=ids.MODELS_DOWNLOAD),
        html.Span(id=ids.MODELS_EXPORT_MSG, className="cl-hint"),
    ])
    results = dcc.Loading(type="circle", children=html.Div(children=[
        message(ids.MODELS_MSG),
        html.Div(id=ids.MODELS_SUMMARY),
        html.Div(className="cl-graph", children=dcc.Graph(
            id=ids.MODELS_GRAPH, config=GRAPH_CONFIG, style={"height": "520px"},
            figure=placeholder_figure())),
        html.P(OVERLAY_CAPTION, className="cl-hint"),
        html.Div(className="cl-view-controls", children=[
            html.Label("Details of model", className="cl-label"),
            dcc.Dropdown(id=ids.MODELS_CHOSEN, options=[], value=None, clearable=False,
                         placeholder="fit models first", style={"minWidth": "24rem"}),
        ]),
    ]))
    # its own spinner: choosing another model's details must not hide the results above
    details = dcc.Loading(type="circle", children=html.Div(id=ids.MODELS_DETAIL))
    return section(ANCHOR, "Models: does the covariate change the rate of change?",
                   "Fit mixed models with a time × covariate term under several working "
                   "covariance structures, compare them, and read the answer with model-based "
                   "and robust standard errors. Fitting starts only when you press the button.",
                   dcc.Store(id=ids.MODELS_SNAPSHOT),
                   html.Div(id=ids.MODELS_SECTION, children=[
                       controls, buttons,
                       html.Div(id=ids.MODELS_STATUS, className="cl-status"),
                       results, details]))


# ------------------------------------------------------------------ pure helpers
def choices_from_controls(structures, correlation, method, confounders, spline_df) -> ModelChoices:
    """The model options from the control values (ModelError with a message when unusable)."""
    if not structures:
        raise ModelError("Tick at least one covariance structure to fit.")
    if spline_df in ("", None):
        spline_df = None
    elif isinstance(spline_df, (int, float)) and float(spline_df).is_integer():
        spline_df = int(spline_df)
    return ModelChoices(structures=tuple(structures or ()), correlation=correlation or "exponential",
                        method=method or "reml", confounders=tuple(confounders or ()),
                        time_spline_df=spline_df)


def confounder_options(roles: dict | None, settings: dict | None) -> list[dict]:
    """Baseline covariates under the roles other than the primary one."""
    covs = list(((roles or {}).get("roles") or {}).get("covariates") or [])
    primary = (settings or {}).get("covariate") or (covs[0] if covs else None)
    return [option(c, c) for c in covs if c != primary]


def snapshot_key(context: AppContext, data, roles, settings, choices: ModelChoices) -> str:
    """What a fitted model set depends on: data key, roles, the cohort's settings and the choices."""
    dataset, r, s = context.inputs(data, roles, settings)
    d = s.to_dict()
    sub = {k: d[k] for k in Workbench.stage_fields("models", s)}
    return json_key([dataset.key, r.to_dict(), sub, choices.to_dict()])


def fit_for_view(context: AppContext, data, roles, settings, choices: ModelChoices):
    """(model set, cohort) through the app's Workbench cache."""
    dataset, r, s = context.inputs(data, roles, settings)
    return context.workbench.models(dataset, r, s, choices), context.workbench.cohort(dataset, r, s)


def placeholder_figure(text: str = "Press “Fit models” to draw the fitted semivariograms.") -> dict:
    """A blank figure with ``text``, in the page's figure style."""
    return empty_figure(text).to_plotly_json()


def datatable(frame: pd.DataFrame, **extra) -> dash_table.DataTable:
    return dash_table.DataTable(data=frame.to_dict("records"),
                                columns=[{"name": c, "id": c} for c in frame.columns],
                                **TABLE_STYLE, **extra)


def effect_block(models) -> html.Div:
    """The plain-language answer in large type with its caution."""
    e = models.effect
    if e is None:
        return html.Div(className="cl-effect", children=[html.P(
            "No time × covariate term was fitted (the primary covariate is not numeric), so "
            "there is no statement about the rate of change.", className="cl-effect-main")])
    # the statement already says it is an association; the caution adds what it is adjusted for
    caution = ("" if ASSOCIATION_NOTE in e.statement else ASSOCIATION_NOTE + " ") + (
        "Adjusted only for what is in the mean model. " + " ".join(CAUTIONS))
    return html.Div(className="cl-effect", role="status", children=[
        html.P(e.statement, className="cl-effect-main",
               style={"fontSize": "1.45rem", "fontWeight": 600, "lineHeight": 1.35}),
        html.P(f"With robust (sandwich) SEs, which do not rely on the working covariance: "
               f"95% CI {format_number(e.robust_lo, 3)} to {format_number(e.robust_hi, 3)}.",
               className="cl-effect-alt", style={"fontSize": "1.1rem"}),
        html.P([html.Strong("Caution: "), caution], className="cl-caveat"),
        html.P(f"From {models.preferred or e.model}: {p_phrase(e.p)} (model-based), "
               f"{p_phrase(e.robust_p)} (robust).", className="cl-hint"),
    ])


def summary_children(models, *, unit: str) -> list:
    """Effect statement, comparison with its notes, LRTs with the mixture note, GEE rows, notes."""
    t = model_tables(models, unit=unit)
    preferred_row = [{"if": {"filter_query": '{preferred} = "★"'}, "fontWeight": 700,
                      "backgroundColor": "#eef4fb"}]
    small = [html.P(t.small_sample, className="cl-msg", role="note")] if t.small_sample else []
    out = [effect_block(models), *small,
           html.H3("Comparing working covariance structures"),
           html.P(models.mean.describe("the primary covariate (x)") +
                  f" {models.n_subjects:,} subjects, {models.n_obs:,} visits.", className="cl-note"),
           datatable(t.comparison, style_data_conditional=preferred_row),
           *[html.P("At the boundary — " + n, className="cl-caveat") for n in t.boundary_notes],
           html.P(PREFERRED_RULE, className="cl-caveat"),
           html.P(t.method_note, className="cl-caveat")]
    if t.warning:
        out.append(html.P("Caution: " + t.warning, className="cl-msg"))
    out.append(html.H3("Likelihood-ratio tests of nested structures"))
    out.append(datatable(t.lrt) if len(t.lrt) else
               html.P("No nested pairs among the fitted models.", className="cl-note"))
    out.append(html.P(MIXTURE_NOTE, className="cl-caveat"))
    out += [html.P(n, className="cl-caveat") for n in t.lrt_notes]
    if len(t.gee):
        out += [html.H3("GEE robustness rows (time and time × covariate)"), datatable(t.gee),
                html.P("GEE estimates with robust (sandwich) SEs do not rely on the working "
                       "covariance being right; similar numbers here support the mixed-model "
                       "reading.", className="cl-caveat")]
    if models.notes:
        out += [html.H3("Notes"), html.Ul([html.Li(n) for n in models.notes])]
    return out


def detail_children(models, chosen: str | None, *, unit: str, x_note: str = "") -> list:
    """Fixed effects (both SEs, both CIs and p-values, reference) and variance parameters."""
    t = model_tables(models, chosen, unit=unit)
    if t.chosen is None:
        return [html.P("No model could be fitted.", className="cl-msg")]
    small = [html.P(t.small_sample, className="cl-msg", role="note")] if t.small_sample else []
    return [*small, html.H3(f"Fixed effects — {t.chosen}"), datatable(t.fixed),
            html.P(f"{x_note} Time in {unit}. Intervals and p-values: {t.reference}. Robust SEs: "
                   "sandwich estimator clustered by subject, Mancl–DeRouen bias-reduced."
                   .strip(), className="cl-caveat"),
            html.H3(f"Variance parameters — {t.chosen}"), datatable(t.variance)]


def report_text(context: AppContext, data, roles, settings, snapshot: dict | None,
                chosen: str | None = None, plan_request: dict | None = None,
                subject: str | None = None) -> tuple[str, str]:
    """(file name, HTML) of the report for the current choices.

    Models are included when the last fit (``snapshot``) was made for these
    same data, roles and cohort settings; they come from the cache. The plan of the next
    study is included when one was made from those models (``plan_request``).
    """
    dataset, r, s = context.inputs(data, roles, settings)
    wb = context.workbench
    exploration = wb.explore(dataset, r, s)
    cohort = exploration.cohort
    models = choices = None
    if snapshot and snapshot.get("choices") is not None:
        choices = ModelChoices.from_dict(snapshot["choices"])
        if snapshot.get("key") == snapshot_key(context, data, roles, settings, choices):
            models = wb.models(dataset, r, s, choices)
        else:
            choices = None
    if on_cluster(context, dataset):       # serve --engine dask
        from ..figures import aggregate_report_figures
        figures, plan_request = aggregate_report_figures(exploration, models), None
    else:
        figures = report_figures(exploration, models, chosen=chosen, subject=subject)
    # the file name this session gave its table (the shared store keeps none for uploads)
    name = (data or {}).get("name") or dataset.name
    made = plan_figure = None
    if models is not None and plan_request and \
            (plan_request.get("snapshot") or {}).get("key") == snapshot.get("key"):
        from ..figures import report_plan_figure
        from .plan import make_plan

        made = make_plan(context, plan_request)[0]
        plan_figure = report_plan_figure(made)
    text = build_report(cohort, exploration, models, data_name=name,
                        data_key=fingerprint(dataset.frame), choices=choices, figures=figures,
                        chosen=chosen, plan=made, plan_figure=plan_figure)
    stem = re.sub(r"[^A-Za-z0-9_-]+", "-", name.rsplit(".", 1)[0]).strip("-") or "data"
    return f"cohortlens-report-{stem}.html", text


# ------------------------------------------------------------------ callbacks
STORES = (State(ids.STORE_DATA, "data"), State(ids.STORE_ROLES, "data"),
          State(ids.STORE_SETTINGS, "data"))
CONTROLS = (ids.MODELS_STRUCTURES, ids.MODELS_CORRELATION, ids.MODELS_METHOD,
            ids.MODELS_CONFOUNDERS, ids.MODELS_SPLINE_DF)


def register(app, context: AppContext) -> None:
    @app.callback(Output(ids.MODELS_CONFOUNDERS, "options"), Output(ids.MODELS_CONFOUNDERS, "value"),
                  Input(ids.STORE_ROLES, "data"), Input(ids.STORE_SETTINGS, "data"),
                  State(ids.MODELS_CONFOUNDERS, "value"))
    def confounders(roles, settings, current):
        opts = confounder_options(roles, settings)
        allowed = {o["value"] for o in opts}
        return opts, [c for c in (current or []) if c in allowed]

    @app.callback(Output(ids.MODELS_STATUS, "children"),
                  Input(ids.STORE_DATA, "data"), Input(ids.STORE_ROLES, "data"),
                  Input(ids.STORE_SETTINGS, "data"),
                  *[Input(c, "value") for c in CONTROLS], Input(ids.MODELS_SNAPSHOT, "data"),
                  State(ids.MODELS_MSG, "children"))
    def status(data, roles, settings, structures, correlation, method, conf, df, snapshot,
               shown):
        def check():
            choices = choices_from_controls(structures, correlation, method, conf, df)
            key = snapshot_key(context, data, roles, settings, choices)
            if snapshot and snapshot.get("key") != key:
                return ("The results below were fitted for earlier choices; press “Fit models” "
                        "to refit.")
            return ""

        text, msg, err = attempt(check, what="checking the model choices")
        if text is not None:
            return text
        # a problem already shown by the last fit attempt is not repeated
        return "" if isinstance(err, NeedsInput) or msg == shown else msg

    @app.callback(
        output=dict(msg=Output(ids.MODELS_MSG, "children"),
                    summary=Output(ids.MODELS_SUMMARY, "children"),
                    fig=Output(ids.MODELS_GRAPH, "figure"),
                    chosen_opts=Output(ids.MODELS_CHOSEN, "options"),
                    chosen=Output(ids.MODELS_CHOSEN, "value"),
                    snapshot=Output(ids.MODELS_SNAPSHOT, "data")),
        inputs=dict(n=Input(ids.MODELS_FIT, "n_clicks"), stores=STORES,
                    controls=tuple(State(c, "value") for c in CONTROLS)),
        prevent_initial_call=True)
    def fit(n, stores, controls):
        value, msg, _ = attempt(lambda: fit_outputs(context, *stores, *controls),
                                what="fitting the models")
        if value is not None:
            return value
        return dict(msg=msg, summary=[], fig=placeholder_figure("No models fitted."),
                    chosen_opts=[], chosen=None, snapshot=None)

    @app.callback(Output(ids.MODELS_DETAIL, "children"), Input(ids.MODELS_CHOSEN, "value"),
                  Input(ids.MODELS_SNAPSHOT, "data"), prevent_initial_call=True)
    def detail(chosen, snapshot):
        if not snapshot:
            return []

        def make():
            choices = ModelChoices.from_dict(snapshot["choices"])
            models, cohort = fit_for_view(context, snapshot["data"], snapshot["roles"],
                                          snapshot["settings"], choices)
            return detail_children(models, chosen, unit=cohort.settings.unit,
                                   x_note=x_description(cohort))

        value, msg, _ = attempt(make, what="showing the model details")
        return value if value is not None else html.P(msg, className="cl-msg")

    @app.callback(Output(ids.MODELS_DOWNLOAD, "data"), Output(ids.MODELS_EXPORT_MSG, "children"),
                  Input(ids.MODELS_EXPORT, "n_clicks"), *STORES,
                  State(ids.MODELS_SNAPSHOT, "data"), State(ids.MODELS_CHOSEN, "value"),
                  State("plan-request", "data"), State(ids.STORE_SUBJECT, "data"),
                  prevent_initial_call=True)
    def export(n, data, roles, settings, snapshot, chosen, plan_request, subject):
        value, msg, _ = attempt(lambda: report_text(context, data, roles, settings, snapshot,
                                                    chosen, plan_request, subject),
                                what="writing the report")
        if value is None:
            return no_update, msg
        name, text = value
        return dict(content=text, filename=name, type="text/html"), f"Report ready: {name}"


def fit_outputs(context: AppContext, data, roles, settings, structures, correlation, method,
                confounders, spline_df) -> dict:
    """Everything the Fit button shows (the fit callback's outputs)."""
    choices = choices_from_controls(structures, correlation, method, confounders, spline_df)
    models, cohort = fit_for_view(context, data, roles, settings, choices)
    if not models.fits:
        raise ModelError("none of the chosen models could be fitted: " + "; ".join(models.notes))
    _, _, s = context.inputs(data, roles, settings)
    vg = models.residual_variogram(n_bins=s.variogram_bins, max_lag=s.variogram_max_lag)
    fig = fitted_variogram_figure(vg, models, look=cohort_look(cohort))
    names = list(models.fits)
    snapshot = {"key": snapshot_key(context, data, roles, settings, choices), "data": data,
                "roles": roles, "settings": settings, "choices": choices.to_dict()}
    return dict(msg="", summary=summary_children(models, unit=s.unit), fig=fig,
                chosen_opts=[{"label": f"{n} ★" if n == models.preferred else n, "value": n}
                             for n in names],
                chosen=models.preferred or names[0], snapshot=snapshot)
