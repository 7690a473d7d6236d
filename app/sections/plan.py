"""Plan the next study: how many subjects would a new study need, assuming this cohort's covariance?

Self-contained section (layout, ids, callbacks). It plans from the model set
the Models section fitted (its snapshot store, the same cached
``Workbench.models`` call), with every input defaulting to what this cohort
shows (:mod:`analysis.models.plan_defaults`) and editable.
"""
from __future__ import annotations

import math
from dataclasses import replace

import numpy as np
import pandas as pd
from dash import Input, Output, State, dash_table, dcc, html, no_update

from analysis.errors import CohortError, SettingsError
from analysis.models.modelstage import ModelChoices
from analysis.models.plan_defaults import parse_schedule, plan_from_cohort
from analysis.models.planning import simulate_power
from analysis.numbers import fmt
from analysis.output.report import plan_sentences

from .. import ids
from ..views import model_chooser, refuse_on_cluster
from ..components import GRAPH_CONFIG, section
from ..figures import power_figure
from ..session import AppContext, attempt

# ------------------------------------------------------------------ ids (this section's own)
ANCHOR = "section-plan"
NAV = "Plan"
HINT = "plan-hint"
BODY = "plan-body"
MODEL = "plan-model"
DESIGN = "plan-design"
EFFECT = "plan-effect"
ALPHA = "plan-alpha"
POWER = "plan-power"
SCHEDULE = "plan-schedule"
DROPOUT = "plan-dropout"
MSG = {k: f"plan-{k}-msg" for k in ("model", "effect", "alpha", "power", "schedule", "dropout")}
GENERAL_MSG = "plan-msg"
ANSWER = "plan-answer"
GRAPH = "plan-graph"
TABLE = "plan-table"
ASSUMPTIONS = "plan-assumptions"
STORE = "plan-request"                  # store: the inputs of the plan last shown
SIMULATE = "plan-simulate"
SIM_REPS = "plan-sim-reps"
SIM_OUT = "plan-sim-out"

#: replication counts offered for the simulation check (bounded: each refits a cohort)
SIM_CHOICES = (20, 50, 100, 200)
SIM_DEFAULT = 50
ROW = {"display": "grid", "gap": "0.5rem 2rem", "alignItems": "start",
       "gridTemplateColumns": "repeat(auto-fit, minmax(15rem, 1fr))"}
CAUTION_WORDS = ("A plan inherits this cohort's covariance and its biases; the effect size is the "
                 "team's decision; no substitute for a trial statistician's sign-off.")


# ------------------------------------------------------------------ layout
def _field(label, control, key, hint=None):
    return html.Div(className="cl-field", children=[
        html.Label(label, className="cl-label", htmlFor=control.id), control,
        *([html.Small(hint, className="cl-hint")] if hint else []),
        html.Div(id=MSG[key], className="cl-msg", role="alert")])


def layout(settings=None, max_upload_bytes=None) -> html.Section:
    return plan_section()


def plan_section() -> html.Section:
    """Inputs (filled with this cohort's defaults once models are fitted) and the plan."""
    controls = html.Div(style=ROW, children=[
        _field("Fitted model (covariance)", dcc.Dropdown(id=MODEL, options=[], value=None,
                                                        clearable=False,
                                                        placeholder="fit models first"), "model"),
        html.Div(className="cl-field", children=[
            html.Label("Design", className="cl-label"),
            dcc.RadioItems(id=DESIGN, className="cl-radio", value="continuous", options=[
                {"label": "continuous covariate like this cohort's", "value": "continuous"},
                {"label": "two equal groups (difference in slopes)", "value": "two-groups"}]),
        ]),
        _field("Effect to detect", dcc.Input(id=EFFECT, type="number", debounce=True,
                                             className="cl-input"), "effect",
               "time × x coefficient (continuous) or difference in slopes per time unit "
               "(two groups); starts at the fitted estimate"),
        _field("Significance level (two-sided)", dcc.Input(id=ALPHA, type="number", value=0.05,
                                                           step="any", debounce=True,
                                                           className="cl-input"), "alpha"),
        _field("Target power", dcc.Input(id=POWER, type="number", value=0.8, step="any",
                                         debounce=True, className="cl-input"), "power"),
        _field("Planned visit times", dcc.Input(id=SCHEDULE, type="text", debounce=True,
                                                placeholder="0, 6, 12, 24",
                                                className="cl-input"), "schedule",
               "since the origin, in the cohort's time unit, separated by commas"),
        _field("Dropout rate per time unit", dcc.Input(id=DROPOUT, type="number", min=0, max=None,
                                                       step="any", debounce=True,
                                                       className="cl-input"), "dropout",
               "constant hazard; starts at this cohort's rate"),
    ])
    sim = html.Div(className="cl-view-controls", children=[
        html.Button("Check by simulation", id=SIMULATE, className="cl-btn"),
        dcc.Dropdown(id=SIM_REPS, clearable=False, value=SIM_DEFAULT, style={"minWidth": "9rem"},
                     options=[{"label": f"{r} cohorts", "value": r} for r in SIM_CHOICES]),
        html.Small("each simulated cohort is refitted: about a second each for the fullest "
                   "structure", className="cl-hint"),
    ])
    return section(ANCHOR, "Plan the next study",
                   "How many subjects would a new study need to detect a time × covariate "
                   "effect, if its subjects vary like this cohort's? Starts from the fitted "
                   "models and this cohort's visits and dropout; change any input.",
                   dcc.Store(id=STORE),
                   html.P(id=HINT, className="cl-note",
                          children="Fit the models in the section above first; the plan uses "
                                   "their fitted covariance."),
                   html.Div(id=BODY, style={"display": "none"}, children=[
                       controls,
                       html.Div(id=GENERAL_MSG, className="cl-msg", role="alert"),
                       html.Div(id=ANSWER, className="cl-effect", role="status"),
                       html.Div(className="cl-graph", children=dcc.Loading(
                           type="circle", delay_show=500, children=dcc.Graph(
                               id=GRAPH, config=GRAPH_CONFIG, style={"height": "420px"},
                               figure=_blank()))),
                       html.H3("Subjects needed under each fitted covariance"),
                       html.Div(id=TABLE),
                       html.Div(id=ASSUMPTIONS),
                       sim, dcc.Loading(type="circle", children=html.Div(id=SIM_OUT,
                                                                          role="status")),
                       html.P([html.Strong("Caution: "), CAUTION_WORDS], className="cl-caveat"),
                   ]))


def _blank(text="The power curve appears here.") -> dict:
    return {"data": [], "layout": {
        "xaxis": {"visible": False}, "yaxis": {"visible": False},
        "annotations": [{"text": text, "showarrow": False, "font": {"size": 16},
                         "xref": "paper", "yref": "paper", "x": 0.5, "y": 0.5}]}}


# ------------------------------------------------------------------ pure helpers
def per_model_table(made) -> dash_table.DataTable:
    frame = made.comparison.to_frame()
    frame = pd.DataFrame({
        "model": [f"{n} ★" if n == made.model else n for n in frame["name"]],
        "subjects needed": frame["subjects_needed"],
        "per group": frame["per_group"],
        "standard error": [fmt(v) if v is not None and not pd.isna(v) else "—"
                           for v in frame["standard_error"]],
        "problem": frame["error"].fillna(""),
    })
    if made.inputs.design != "two-groups":
        frame = frame.drop(columns="per group")
    return dash_table.DataTable(data=frame.to_dict("records"),
                                columns=[{"name": c, "id": c} for c in frame.columns],
                                style_cell={"fontFamily": "inherit", "fontSize": "15px",
                                            "padding": "4px 10px", "textAlign": "left"},
                                style_header={"fontWeight": "600"}, style_as_list_view=True)


def assumptions_children(made, unit: str) -> list:
    v = made.inputs.covariance.variance
    return [html.H3("Assumptions"),
            html.Ul([html.Li(t) for t in plan_sentences(made, unit)[1:]]
                    + [html.Li(f"{k.replace('_', ' ')}: {src}") for k, src in made.sources.items()]
                    + [html.Li("Variance parameters: " + ", ".join(
                        f"{k.replace('_', ' ')} {fmt(x)}" for k, x in v.items()))]
                    + [html.Li(n) for n in made.notes]),
            html.H3("Cautions"), html.Ul([html.Li(c) for c in made.plan.cautions])]


def _number(value, name):
    """A control value as float, None when empty; SettingsError naming the control otherwise."""
    if value in (None, ""):
        return None
    try:
        out = float(value)
    except (TypeError, ValueError):
        raise SettingsError(f"{name}: {value!r} is not a number") from None
    if not math.isfinite(out):
        raise SettingsError(f"{name}: must be a finite number")
    return out


def request_from_controls(snapshot, model, design, effect, alpha, power, schedule, dropout
                          ) -> dict:
    """The plan request (JSON-safe) from the control values; SettingsError names the control."""
    req = {"snapshot": snapshot, "model": model or None, "design": design or "continuous"}
    for key, value, name in (("effect", effect, "effect"), ("alpha", alpha, "alpha"),
                             ("power", power, "power"), ("dropout_rate", dropout, "dropout")):
        try:
            req[key] = _number(value, name)
        except SettingsError as err:
            raise SettingsError(str(err), field=name) from None
    try:
        sched = parse_schedule(schedule)
    except SettingsError as err:
        raise SettingsError(str(err), field="schedule") from None
    req["schedule"] = list(sched) if sched else None
    return req


def make_plan(context: AppContext, request: dict):
    """(CohortPlan, time unit) for a request: cached models and cohort of the snapshot."""
    snap = request["snapshot"]
    dataset, r, s = context.inputs(snap["data"], snap["roles"], snap["settings"])
    refuse_on_cluster(context, dataset, "The next-study plan (from the fitted model's visits)")
    wb = context.workbench
    models = wb.models(dataset, r, s, ModelChoices.from_dict(snap["choices"]))
    cohort = wb.cohort(dataset, r, s)
    dropout = wb.summaries(dataset, r, s).dropout
    kw = {k: request.get(k) for k in ("effect", "schedule", "dropout_rate")}
    if kw["schedule"] is not None:
        kw["schedule"] = tuple(kw["schedule"])
    common = dict(model=request.get("model"), design=request.get("design") or "continuous",
                  alpha=0.05 if request.get("alpha") is None else request["alpha"],
                  power=0.8 if request.get("power") is None else request["power"])
    made = plan_from_cohort(cohort, models, dropout, **common, **kw)
    if any(v is not None for v in kw.values()):
        # a control still showing its default says where the default came from
        base = plan_from_cohort(cohort, models, dropout, **common)
        shown = default_values(base)
        sources = dict(made.sources)
        for key, value in (("effect", request.get("effect")),
                           ("schedule", request.get("schedule")),
                           ("dropout_rate", request.get("dropout_rate"))):
            if value is not None and _same(value, shown[key]):
                sources[key] = base.sources[key] + " (as shown in the control)"
        made = replace(made, sources=sources)
    return made, s.unit


def default_values(made) -> dict:
    """The defaults as the controls show them (4 significant figures)."""
    i = made.inputs
    return {"effect": float(f"{i.effect:.4g}"), "schedule": [float(f"{t:g}") for t in i.schedule],
            "dropout_rate": float(f"{i.dropout_rate:.4g}")}


def _same(a, b) -> bool:
    return bool(np.allclose(np.asarray(a, dtype=float), np.asarray(b, dtype=float),
                            rtol=1e-12, atol=0)) if np.shape(a) == np.shape(b) else False


#: which control a message belongs beside, by the start of the message
_FIELD_OF = (("effect", "effect"), ("alpha", "alpha"), ("power", "power"),
             ("dropout", "dropout"), ("schedule", "schedule"), ("model", "model"))


def field_of(err: CohortError | None) -> str | None:
    f = getattr(err, "field", None)
    if f in MSG:
        return f
    text = str(err or "").lower()
    for start, key in _FIELD_OF:
        if text.startswith(start):
            return key
    return None


def simulation_text(check) -> str:
    if not check.reps:
        return "No simulated cohort could be fitted."
    return (f"Simulated power {check.empirical_power:.3f} ± {check.mcse:.3f} (Monte-Carlo SE) "
            f"from {check.reps} refitted cohorts of {check.subjects:,} subjects; the "
            f"calculation gives {check.analytic_power:.3f}."
            + (f" {check.n_failed} fit(s) failed and were left out." if check.n_failed else ""))


# ------------------------------------------------------------------ callbacks
def register(app, context: AppContext) -> None:
    def fitted(snapshot):
        dataset, r, s = context.inputs(snapshot["data"], snapshot["roles"],
                                       snapshot["settings"])
        return context.workbench.models(dataset, r, s,
                                        ModelChoices.from_dict(snapshot["choices"]))

    model_chooser(app, hint=HINT, body=BODY, model=MODEL, read_models=fitted)

    @app.callback(Output(EFFECT, "value"), Output(SCHEDULE, "value"), Output(DROPOUT, "value"),
                  Input(MODEL, "value"), Input(DESIGN, "value"),
                  State(ids.MODELS_SNAPSHOT, "data"), prevent_initial_call=True)
    def defaults(model, design, snapshot):
        if not snapshot or not model:
            return no_update, no_update, no_update
        made, _, _ = attempt(lambda: make_plan(context, {"snapshot": snapshot, "model": model,
                                                         "design": design})[0],
                             what="reading the plan defaults")
        if made is None:
            return None, no_update, no_update
        d = default_values(made)
        return d["effect"], ", ".join(f"{t:g}" for t in d["schedule"]), d["dropout_rate"]

    outs = dict(answer=Output(ANSWER, "children"), fig=Output(GRAPH, "figure"),
                table=Output(TABLE, "children"), assumptions=Output(ASSUMPTIONS, "children"),
                store=Output(STORE, "data"), general=Output(GENERAL_MSG, "children"),
                msgs={k: Output(v, "children") for k, v in MSG.items()})

    @app.callback(output=outs,
                  inputs=dict(values=tuple(Input(c, "value") for c in (
                      MODEL, DESIGN, EFFECT, ALPHA, POWER, SCHEDULE, DROPOUT)),
                      snapshot=State(ids.MODELS_SNAPSHOT, "data")),
                  prevent_initial_call=True)
    def compute(values, snapshot):
        empty = {k: "" for k in MSG}
        if not snapshot or not values[0]:
            return dict(answer=[], fig=_blank(), table=[], assumptions=[], store=None,
                        general="", msgs=empty)

        def run():
            req = request_from_controls(snapshot, *values)
            made, unit = make_plan(context, req)
            return req, made, unit

        value, msg, err = attempt(run, what="planning the next study")
        if value is None:
            key = field_of(err)
            msgs = dict(empty, **({key: msg} if key else {}))
            return dict(answer=[], fig=_blank("No plan: see the message above."), table=[],
                        assumptions=[], store=None, general="" if key else msg, msgs=msgs)
        req, made, unit = value
        p = made.plan
        answer = [html.P([html.Span(f"{p.subjects_needed:,}", id="plan-needed",
                                    style={"fontSize": "2.2rem", "fontWeight": 700}),
                          " subjects needed" + (f" ({p.per_group:,} per group)"
                                                 if p.per_group else "")],
                         className="cl-effect-main", style={"margin": "0.3rem 0"}),
                  html.P(plan_sentences(made, unit)[0], style={"fontSize": "1.1rem"})]
        return dict(answer=answer, fig=power_figure(made), table=per_model_table(made),
                    assumptions=assumptions_children(made, unit), store=req, general="",
                    msgs=empty)

    @app.callback(Output(SIM_OUT, "children"), Input(SIMULATE, "n_clicks"),
                  State(STORE, "data"), State(SIM_REPS, "value"), prevent_initial_call=True)
    def simulate(n, request, reps):
        if not request:
            return html.P("Make a plan first (fix the inputs above).", className="cl-msg")

        def run():
            r = int(reps) if reps in SIM_CHOICES else SIM_DEFAULT
            made, _ = make_plan(context, request)
            return simulation_text(simulate_power(made.inputs, reps=r, seed=0))

        text, msg, _ = attempt(run, what="simulating the planned study")
        return html.P(text) if text is not None else html.P(msg, className="cl-msg")
