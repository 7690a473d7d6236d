"""The answer first: a compact strip at the top of the main column.

Cohort (subjects, visits, follow-up), the primary covariate and its groups, and — once models
are fitted for the current choices — the time × covariate effect with its interval and the
preferred covariance structure. Each item links to the section it comes from. The numbers come
from :mod:`analysis.output.overview`; the models are read from the Workbench cache through the
Models section's snapshot store (never refitted here).
"""
from __future__ import annotations

from dash import Input, Output, html

from analysis.models.modelstage import ModelChoices
from analysis.numbers import fmt, format_number
from analysis.output.overview import answer_overview, cohort_overview

from .. import ids
from ..session import AppContext, NeedsInput, attempt
from ..views import stage_call
from . import courses, kept, models

#: no navigation entry: the strip is the top of the page itself
ANCHOR = None
NAV = None
STRIP = "summary-strip"
COHORT_ITEM = "summary-cohort"
GROUPS_ITEM = "summary-groups"
ANSWER_ITEM = "summary-answer"
PREFERRED_ITEM = "summary-preferred"


def layout(settings=None, max_upload_bytes=None) -> html.Section:
    return html.Section(id=STRIP, className="cl-summary", role="status",
                        **{"aria-label": "Summary of the analysis"},
                        children=html.Span("Summary appears once the data are loaded.",
                                           className="cl-hint"))


# ------------------------------------------------------------------ pure helpers
def _item(id_: str, anchor: str, label: str, text, title: str = "") -> html.A:
    """One linked item; ``label`` shows in front (empty: the text speaks for itself)."""
    head = [html.Span(label, className="cl-sum-label"), " "] if label else []
    return html.A(id=id_, href=f"#{anchor}", className="cl-sum-item", title=title or None,
                  children=[*head, *(text if isinstance(text, list) else [text])])


def _singular(unit: str) -> str:
    return unit[:-1] if unit.endswith("s") else unit


def cohort_items(ov) -> list:
    """The cohort and groups items of the strip from a :class:`CohortOverview`."""
    fu = (f"follow-up median {fmt(ov.followup_median, 2)} "
          f"({fmt(ov.followup_min, 2)}–{fmt(ov.followup_max, 2)}) {ov.time_unit}"
          if ov.subjects else "no subjects")
    cohort = _item(COHORT_ITEM, kept.ANCHOR, "",
                   [html.B(f"{ov.subjects:,} subjects"), f", {ov.visits:,} visits, {fu}"],
                   title="Subjects and visits analysed; follow-up is the time of each subject's "
                         "last analysed visit after the origin.")
    k = len(ov.group_sizes)
    if not ov.covariate and (not ov.stratifier or k <= 1):
        groups_text, title = "no baseline covariate chosen (one group of all subjects)", ""
    elif ov.stratifier and k:
        lo, hi = min(ov.group_sizes), max(ov.group_sizes)
        sizes = f"n {lo:,}" + (" each" if k > 1 else "") if lo == hi else f"n {lo:,}–{hi:,}"
        none = f", {ov.no_value:,} without a value" if ov.no_value else ""
        primary = f"{ov.covariate_label}: " if ov.covariate else ""
        groups_text = (f"{primary}{k} group{'s' if k > 1 else ''}"
                       f"{'' if ov.covariate == ov.stratifier else ' of ' + ov.stratifier}, "
                       f"{sizes}{none}")
        title = "Groups: " + "; ".join(f"{lab} (n={n:,})"
                                       for lab, n in zip(ov.group_labels, ov.group_sizes))
    else:
        groups_text, title = "no baseline covariate chosen", ""
    groups = _item(GROUPS_ITEM, courses.ANCHOR, "", groups_text,
                   title=f"Primary covariate and its {title[0].lower()}{title[1:]}" if title
                   else "")
    return [cohort, groups]


def answer_items(ans, *, response_unit: str, time_unit: str) -> list:
    """The models items from an :class:`AnswerOverview`: the change in slope per covariate step
    with its interval and the preferred structure (its full name, the correlation shape and the
    method, and the whole effect statement are in the item's tooltip)."""
    short = (ans.preferred or "").split(" (")[0]
    if not ans.has_effect:
        text = ["no time × covariate term (the primary covariate is not numeric)"]
    else:
        unit = f" {response_unit}" if response_unit else ""
        per = ans.step.replace("each ", "per ", 1).removesuffix(" of").removesuffix(" in")
        text = [html.B(f"{format_number(ans.estimate)}{unit}/{_singular(time_unit)}"),
                f" {per} (95% CI {format_number(ans.lo)} to {format_number(ans.hi)})"]
    tip = " ".join(t for t in (ans.statement, f"Preferred structure: {ans.preferred}."
                               if ans.preferred else "") if t)
    answer = _item(ANSWER_ITEM, models.ANCHOR,
                   "Slope change" if ans.has_effect else "Answer", text,
                   title=tip or "Fitted models: comparison and details under Models.")
    if not short:
        return [answer]
    return [answer, _item(PREFERRED_ITEM, models.ANCHOR, "Preferred", html.B(short),
                          title=f"Preferred covariance structure (lowest AIC among converged "
                                f"fits): {ans.preferred}.")]


def waiting_item(text: str) -> html.A:
    return _item(ANSWER_ITEM, models.ANCHOR, "Answer", html.Span(text, className="cl-sum-wait"))


def strip_children(context: AppContext, data, roles, settings, snapshot) -> list:
    """The strip's items for the stores' current values."""
    cohort = stage_call(context, "cohort", data, roles, settings)
    return html.Div(className="cl-sum-line", children=[
        *cohort_items(cohort_overview(cohort)),
        *_answer(context, data, roles, settings, snapshot, cohort)])


def _answer(context, data, roles, settings, snapshot, cohort):
    if not snapshot or snapshot.get("choices") is None:
        return [waiting_item("fit the models (under Models) to read the effect on the rate "
                             "of change")]
    choices = ModelChoices.from_dict(snapshot["choices"])
    if snapshot.get("key") != models.snapshot_key(context, data, roles, settings, choices):
        return [waiting_item("the models were fitted for earlier choices; refit under Models")]
    dataset, r, s = context.inputs(data, roles, settings)
    fitted = context.workbench.models(dataset, r, s, choices)     # cached by the Fit button
    return answer_items(answer_overview(fitted), response_unit=cohort.response_unit,
                       time_unit=s.unit)


# ------------------------------------------------------------------ callbacks
def register(app, context: AppContext) -> None:
    @app.callback(Output(STRIP, "children"),
                  Input(ids.STORE_DATA, "data"), Input(ids.STORE_ROLES, "data"),
                  Input(ids.STORE_SETTINGS, "data"), Input(ids.MODELS_SNAPSHOT, "data"))
    def strip(data, roles, settings, snapshot):
        value, msg, err = attempt(lambda: strip_children(context, data, roles, settings,
                                                         snapshot),
                                  what="summarising the analysis")
        if value is not None:
            return value
        text = msg if isinstance(err, NeedsInput) else \
            "The summary appears once the choices can be used (see the marked control)."
        return html.Span(text, className="cl-hint")
