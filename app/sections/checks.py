"""Model checks: does the chosen fitted model describe the data?

After the Models section has fitted its candidates, this section shows, for one of them
(default: the preferred model), the standardised (decorrelated) residuals against the
fitted values and against time, normal quantile plots of those residuals and of the
predicted random effects, and the highlighted subject's visits with the population and
its own predicted course. The numbers come from :mod:`analysis.models.checks`; the
figures are the Dash-free ones in :mod:`app.figures` (the report draws the same).
"""
from __future__ import annotations

import threading
from collections import OrderedDict

from dash import Input, Output, State, dcc, html

from analysis.models.checks import checks_for
from analysis.models.modelstage import ModelChoices

from .. import ids
from ..views import model_chooser, refuse_on_cluster
from ..components import graph, message, section
from ..figures import CHECK_POINTS, CHECK_SEED, check_figures, cohort_look
from ..session import AppContext, attempt

ANCHOR = "section-checks"
NAV = "Model checks"

MODEL = "checks-model"
HINT = "checks-hint"
BODY = "checks-body"
NOTE = "checks-note"
MSG = "checks-msg"
GRAPHS = {k: f"checks-{k}-graph" for k in ("fitted", "time", "qq", "effects", "subject")}
#: model-check results kept per app (snapshot key, model): a subject click redraws from here
KEPT = 4

NOTE_TEXT = (
    "Standardised residuals: each subject's residuals from the population mean, y − Xβ̂, "
    "multiplied by the inverse Cholesky factor of that subject's fitted covariance. If the "
    "model is right they are independent draws from a standard normal distribution: an even "
    "band about 0, about 95% within the dashed lines, and points on the diagonal of the "
    "quantile plot. The predicted random effects are shrunk towards 0, so their quantile plot "
    "is read for its shape (a straight line), not its slope. Large cohorts: each figure draws "
    f"at most {CHECK_POINTS:,} points — a random sample (seed {CHECK_SEED}) in the residual "
    "plots, points evenly spaced in rank with the most extreme kept in the quantile plots; "
    "the highlighted subject is always drawn.")


def layout(settings=None, max_upload_bytes=None) -> html.Section:
    return section(
        ANCHOR, "Model checks: does the fitted model describe the data?",
        "Residuals and predictions of one fitted model. Click a subject in any view to see its "
        "visits with the population and its own predicted course.",
        html.P(id=HINT, className="cl-note",
               children="Fit the models in the section above first."),
        html.Div(id=BODY, style={"display": "none"}, children=[
            html.Div(className="cl-view-controls", children=[
                html.Label("Model to check", className="cl-label", htmlFor=MODEL),
                dcc.Dropdown(id=MODEL, options=[], value=None, clearable=False,
                             placeholder="fit models first", style={"minWidth": "24rem"}),
            ]),
            message(MSG),
            html.Div(className="cl-two", children=[graph(GRAPHS["fitted"], 420),
                                                   graph(GRAPHS["time"], 420)]),
            html.Div(className="cl-two", children=[graph(GRAPHS["qq"], 420),
                                                   graph(GRAPHS["effects"], 420)]),
            graph(GRAPHS["subject"], 420),
            html.P(NOTE_TEXT, id=NOTE, className="cl-caveat"),
        ]))


def _models(context: AppContext, snapshot: dict):
    dataset, r, s = context.inputs(snapshot["data"], snapshot["roles"], snapshot["settings"])
    refuse_on_cluster(context, dataset, "The model checks (residuals of every visit)")
    wb = context.workbench
    return (wb.models(dataset, r, s, ModelChoices.from_dict(snapshot["choices"])),
            wb.cohort(dataset, r, s))


def register(app, context: AppContext) -> None:
    kept: OrderedDict = OrderedDict()
    lock = threading.Lock()

    def checks(snapshot, model):
        key = (snapshot.get("key"), model)
        with lock:
            if key in kept:
                kept.move_to_end(key)
                return kept[key]
        models, cohort = _models(context, snapshot)
        value = (checks_for(cohort, models, model), cohort_look(cohort))
        with lock:
            kept[key] = value
            while len(kept) > KEPT:
                kept.popitem(last=False)
        return value

    model_chooser(app, hint=HINT, body=BODY, model=MODEL,
                  read_models=lambda snapshot: _models(context, snapshot)[0])

    @app.callback(*[Output(g, "figure") for g in GRAPHS.values()], Output(MSG, "children"),
                  Input(MODEL, "value"), Input(ids.STORE_SUBJECT, "data"),
                  State(ids.MODELS_SNAPSHOT, "data"), prevent_initial_call=True)
    def draw(model, subject, snapshot):
        blank = {"data": [], "layout": {"xaxis": {"visible": False},
                                        "yaxis": {"visible": False}}}
        if not snapshot or not model:
            return (*[blank] * len(GRAPHS), "")

        def make():
            ch, look = checks(snapshot, model)
            return [fig for _, fig in check_figures(ch, look=look, highlight_subject=subject)]

        figs, msg, _ = attempt(make, what="checking the model")
        if figs is None:
            return (*[blank] * len(GRAPHS), msg)
        return (*figs, "")
