"""One self-contained HTML report of an analysis: choices, cohort, exploration, models.

:func:`model_tables` turns a :class:`~analysis.models.modelling.ModelSet` into the
display tables shown both in the dashboard's model section and in the report,
so the two always say the same thing. :func:`build_report` writes the whole
report as a single HTML string (inline CSS; figures, when given, are HTML
snippets prepared by the caller, e.g. plotly with its JavaScript inlined, so
the file works offline). Nothing here touches the disk.
"""
from __future__ import annotations

import html
from dataclasses import dataclass
from datetime import datetime, timezone

import numpy as np
import pandas as pd
from scipy import stats

from ..exploration.summaries import stratum_column_labels
from ..numbers import fmt, fmt_p, format_number, interval

TITLE = "cohortlens analysis report"
CAUTIONS = (
    "Exploratory research statistics, not for individual care decisions.",
    "Use de-identified data under your institution's approvals.",
)
#: Why REML criteria compare only models sharing one mean model.
REML_NOTE = ("REML likelihoods, AIC and BIC compare only models with the same fixed effects. "
             "Every candidate here shares one mean model, so the comparison is of covariance "
             "structures; to compare mean models, refit by ML.")
ML_NOTE = ("ML likelihoods can compare models with different fixed effects, but ML variance "
           "estimates are biased downwards in small samples; REML is preferred for reporting.")
#: Why the likelihood-ratio p-values are not all plain chi-squared.
MIXTURE_NOTE = ("When the simpler model sets a variance to zero, the edge of its allowed range, "
                "the usual χ² reference is too conservative. Where a known result applies the "
                "p-value uses a 50:50 mixture of χ² distributions; otherwise the plain χ² value "
                "is shown and marked as an approximation. The reference of each test is listed.")
PREFERRED_RULE = "Marked ★: lowest AIC among converged fits (a common-practice rule)."
ASSOCIATION_NOTE = "This is an association in this cohort, not a causal effect."

VARIANCE_LABELS = {
    "intercept_var": "random intercept variance",
    "slope_var": "random slope variance (per {per}²)",
    "intercept_slope_cov": "intercept–slope covariance (per {per})",
    "serial_var": "serial variance σ²",
    "range": "serial range φ ({unit})",
    "error_var": "measurement error variance τ² (nugget)",
}


# --------------------------------------------------------------------------- formatting
def parameter_words(text: str, *, unit: str = "time unit") -> str:
    """``text`` with every variance parameter name (``intercept_var`` ...) in words.

    The engine's boundary notes name parameters by their keys; a reader sees the labels of
    :data:`VARIANCE_LABELS` instead.
    """
    import re

    per = per_unit(unit)
    for key, label in VARIANCE_LABELS.items():
        text = re.sub(rf"(?<![\w]){key}(?![\w])", label.format(unit=unit, per=per), text)
    return text


def p_phrase(p) -> str:
    """'p < 0.0001' or 'p = 0.0312'."""
    text = fmt_p(p)
    return f"p {text}" if text.startswith("<") else f"p = {text}"


def small_sample_note(n_subjects: int) -> str:
    """Plain statement that the intervals rest on small-sample corrections ('' from 30 subjects)."""
    from ..models.mixed import SMALL_COHORT
    if n_subjects >= SMALL_COHORT:
        return ""
    return (f"Only {n_subjects} subjects (fewer than {SMALL_COHORT}): the intervals and p-values "
            "rest on small-sample corrections — t reference distributions with Satterthwaite "
            "degrees of freedom, and the Mancl–DeRouen bias-reduced sandwich with subjects − p "
            "degrees of freedom for the robust ones. They are approximate; read them as rough.")


def variance_interval(lo, hi, at_boundary: bool) -> str:
    """Display text of a variance parameter's 95% interval, saying when it is at the boundary."""
    if at_boundary:
        if lo == 0 and not np.isfinite(hi):
            return "at the boundary (0): one-sided, lower limit 0; no Wald upper limit"
        return "at the boundary: no Wald interval"
    return interval(lo, hi) if np.isfinite([lo, hi]).all() else "not available"


def short_reference(reference: str) -> str:
    """The distribution part of an LRT reference text, e.g. '0.5·χ²(1) + 0.5·χ²(2)'."""
    head = reference.split(";")[0].strip()
    return head + (" (approximate)" if "approximation" in reference else "")


# --------------------------------------------------------------------------- model tables
@dataclass(frozen=True, eq=False)
class ModelTables:
    """Display tables (strings) of a model set, one model's details chosen.

    Attributes
    ----------
    chosen : str or None
        Name of the model whose fixed effects and variance parameters are shown.
    comparison, lrt, fixed, variance, gee : DataFrame
        Ready-to-show tables with human column names.
    boundary_notes : tuple of str
        "model: note" for estimates at the edge of the parameter space.
    lrt_notes : tuple of str
        The full wording of each distinct LRT reference distribution.
    method_note : str
        REML or ML caveat for the comparison.
    warning : str or None
        Caution from :func:`analysis.models.compare.comparison_warning`.
    reference : str
        Reference distribution of the fixed-effect tests.
    small_sample : str
        :func:`small_sample_note` for the cohort size ('' from 30 subjects).
    """

    chosen: str | None
    comparison: pd.DataFrame
    lrt: pd.DataFrame
    fixed: pd.DataFrame
    variance: pd.DataFrame
    gee: pd.DataFrame
    boundary_notes: tuple
    lrt_notes: tuple
    method_note: str
    warning: str | None
    reference: str
    small_sample: str = ""


def model_tables(models, chosen: str | None = None, *, unit: str = "time unit") -> ModelTables:
    """Display tables of a :class:`~analysis.models.modelling.ModelSet`.

    Parameters
    ----------
    models : ModelSet
    chosen : str, optional
        Model whose details are shown (default: the preferred model).
    unit : str
        Time unit for the variance parameter labels.
    """
    fits = models.fits
    if chosen not in fits:
        chosen = models.preferred if models.preferred in fits else next(iter(fits), None)
    comp = models.comparison
    comparison = pd.DataFrame({
        "preferred": ["★" if m == models.preferred else "" for m in comp["model"]],
        "model": comp["model"],
        "params": comp["n_params"].astype(int).astype(str),
        "log-likelihood": comp["loglik"].map(lambda v: fmt(v, 6)),
        "AIC": comp["aic"].map(lambda v: fmt(v, 6)),
        "ΔAIC": comp["delta_aic"].map(lambda v: fmt(v, 3)),
        "BIC": comp["bic"].map(lambda v: fmt(v, 6)),
        "ΔBIC": comp["delta_bic"].map(lambda v: fmt(v, 3)),
        "converged": comp["converged"].map(lambda b: "yes" if b else "NO"),
        "at boundary": comp["boundary"].map(lambda b: "yes" if b else ""),
    })
    boundary_notes = tuple(f"{m}: {parameter_words(b, unit=unit)}"
                           for m, b in zip(comp["model"], comp["boundary"]) if b)
    failed = [c for c in models.candidates if c.fit is None]
    if failed:
        comparison = pd.concat([comparison, pd.DataFrame({
            "preferred": "", "model": [c.name for c in failed], "params": "", "log-likelihood": "",
            "AIC": "", "ΔAIC": "", "BIC": "", "ΔBIC": "", "converged": "not fitted",
            "at boundary": ""})], ignore_index=True)
        boundary_notes += tuple(f"{c.name} not fitted: {c.error}" for c in failed)

    lrt = pd.DataFrame([{
        "simpler model": t.null, "richer model": t.alt, "LR statistic": fmt(t.statistic, 4),
        "extra parameters": str(t.df), "p": fmt_p(t.p), "p (plain χ²)": fmt_p(t.p_naive),
        "reference": short_reference(t.reference)} for t in models.lrts],
        columns=["simpler model", "richer model", "LR statistic", "extra parameters", "p",
                 "p (plain χ²)", "reference"])

    fixed = pd.DataFrame(columns=["term", "estimate", "model-based SE", "df (Satterthwaite)",
                                  "95% CI (model-based)", "p (model-based)", "robust SE",
                                  "df (robust)", "95% CI (robust)", "p (robust)"])
    variance = pd.DataFrame(columns=["parameter", "estimate", "95% CI", "note"])
    reference = ""
    if chosen is not None:
        fit = fits[chosen]
        per = unit[:-1] if unit.endswith("s") else unit
        ff = fit.fixed_frame()
        fixed = pd.DataFrame({
            "term": ff["term"], "estimate": ff["estimate"].map(fmt),
            "model-based SE": ff["se"].map(fmt), "df (Satterthwaite)": ff["df"].map(
                lambda v: fmt(v, 3)),
            "95% CI (model-based)": [interval(a, b) for a, b in zip(ff["lo"], ff["hi"])],
            "p (model-based)": ff["p"].map(fmt_p), "robust SE": ff["robust_se"].map(fmt),
            "df (robust)": ff["robust_df"].map(lambda v: fmt(v, 3)),
            "95% CI (robust)": [interval(a, b) for a, b in zip(ff["robust_lo"], ff["robust_hi"])],
            "p (robust)": ff["robust_p"].map(fmt_p)})
        vf = fit.variance_frame()
        variance = pd.DataFrame({
            "parameter": [VARIANCE_LABELS.get(p, p).format(unit=unit, per=per)
                          for p in vf["parameter"]],
            "estimate": vf["estimate"].map(fmt),
            "95% CI": [variance_interval(a, b, k in fit.at_boundary)
                       for a, b, k in zip(vf["lo"], vf["hi"], vf["parameter"])],
            "note": [parameter_words(n, unit=unit) for n in vf["note"]]})
        reference = fit.reference

    gee_rows = []
    term = models.design.interaction_term
    for g in models.gee:
        if g.fit is None:
            gee_rows.append({"fit": g.name, "term": "", "estimate": "", "robust SE": "",
                             "95% CI": "", "p": "", "note": g.error or ""})
            continue
        ff = g.fit.fixed_frame()
        rows = ff if term is None else ff[ff["term"].isin([term, "time"])]
        for r in rows.to_dict("records"):
            gee_rows.append({"fit": g.name, "term": r["term"], "estimate": fmt(r["estimate"]),
                             "robust SE": fmt(r["robust_se"]), "95% CI": interval(r["lo"], r["hi"]),
                             "p": fmt_p(r["p"]), "note": g.fit.message})
    gee = pd.DataFrame(gee_rows, columns=["fit", "term", "estimate", "robust SE", "95% CI", "p",
                                          "note"])
    lrt_notes = tuple(dict.fromkeys(
        f"{short_reference(t.reference)}: {t.reference.split(';', 1)[1].strip()}"
        for t in models.lrts if ";" in t.reference))
    return ModelTables(chosen=chosen, comparison=comparison, lrt=lrt, fixed=fixed,
                       variance=variance, gee=gee, boundary_notes=boundary_notes,
                       lrt_notes=lrt_notes,
                       method_note=REML_NOTE if models.method == "reml" else ML_NOTE,
                       warning=comp.attrs.get("warning"), reference=reference,
                       small_sample=small_sample_note(models.n_subjects))


# --------------------------------------------------------------------------- human labels
#: Page wording of each role (the column-roles table of the report).
ROLE_LABELS = {
    "subject": "Subject", "time": "Time", "response": "Response",
    "covariates": "Baseline covariates", "event_date": "Event date",
    "response_unit": "Response unit", "covariate_unit": "Covariate unit",
    "followup_end": "Follow-up end",
}


def _words(value) -> str:
    """A setting's value in words: lists joined, numbers with a true minus, none as '—'."""
    if value is None:
        return "—"
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, (list, tuple)):
        return ", ".join(_words(v) for v in value) if value else "—"
    if isinstance(value, (int, float, np.integer, np.floating)):
        return format_number(float(value), 6)
    return str(value)


def settings_frame(settings) -> pd.DataFrame:
    """Every setting by its panel label, with its value in the page's words.

    Labels, choice wording and the default in words come from the declarations in
    :mod:`analysis.settings`; a setting left at None shows its default in words.
    """
    from ..settings import DECLARED, default_text

    rows = []
    for name, decl in DECLARED.items():
        value = getattr(settings, name)
        if decl.kind == "switch":
            text = "yes" if value else "no"
        elif value is None or (decl.kind == "breaks" and not value):
            text = default_text(name) if decl.kind != "breaks" else "none"
        elif decl.choice_labels and value in decl.choice_labels:
            text = decl.choice_labels[value]
        else:
            text = _words(value)
        rows.append({"setting": decl.label, "value": text})
    return pd.DataFrame(rows, columns=["setting", "value"])


def roles_frame(roles) -> pd.DataFrame:
    """Which column plays which part, by the page's role names (unset roles left out)."""
    rows = [{"role": ROLE_LABELS.get(k, k.replace("_", " ").capitalize()), "column": _words(v)}
            for k, v in roles.to_dict().items() if v not in (None, "", [], ())]
    return pd.DataFrame(rows, columns=["role", "column"])


def choices_frame(choices) -> pd.DataFrame:
    """The model options by the Models section's labels, values in its wording."""
    from ..models.modelstage import CHOICE_FIELDS

    rows = []
    for name, value in choices.to_dict().items():
        f = CHOICE_FIELDS.get(name)
        labels = dict(f.options()) if f is not None and f.options else {}
        if name == "gee":
            text = ", ".join(value) if value else "none"
        elif name == "time_spline_df":
            text = "straight line" if value is None else f"natural spline, {value} df"
        elif isinstance(value, (list, tuple)):
            text = ", ".join(labels.get(v, v) for v in value) if value else "none"
        else:
            text = labels.get(value, _words(value))
        rows.append({"option": f.label if f is not None else name, "value": text})
    return pd.DataFrame(rows, columns=["option", "value"])


def stratum_frame(table: pd.DataFrame, *, covariate: str | None, unit: str) -> pd.DataFrame:
    """The group summary with the page's column names (the internal group code left out)."""
    names = {c: ": ".join(p for p in pair if p)
             for c, pair in stratum_column_labels(covariate, unit).items()}
    keep = [c for c in names if c in table.columns]
    return table[keep].rename(columns=names)


# --------------------------------------------------------------------------- HTML pieces
CSS = """
body{font-family:system-ui,-apple-system,"Segoe UI",Roboto,sans-serif;margin:2rem auto;
max-width:72rem;padding:0 1.5rem;color:#1d2430;line-height:1.45}
h1{font-size:1.8rem;margin-bottom:.2rem}h2{font-size:1.3rem;margin-top:2.2rem;
border-bottom:2px solid #d4dae3;padding-bottom:.2rem}h3{font-size:1.05rem;margin-top:1.4rem}
.meta{color:#4a5566;margin:.1rem 0}.caution{border-left:5px solid #b5651d;background:#fbf4ec;
padding:.6rem 1rem;margin:1rem 0}.caution p{margin:.2rem 0;font-weight:600}
table{border-collapse:collapse;margin:.6rem 0;font-size:.92rem}th,td{padding:.25rem .6rem;
border-bottom:1px solid #e1e5eb;text-align:left;vertical-align:top}th{background:#f2f4f7}
td.num{text-align:right;font-variant-numeric:tabular-nums}.note{color:#4a5566;font-size:.9rem}
.effect{font-size:1.35rem;font-weight:600;margin:1rem 0 .4rem;padding:.8rem 1rem;
background:#eef4fb;border-radius:6px}.effect-alt{font-size:1.05rem;margin:.3rem 1rem}
.warn{color:#8a3a00}figure{margin:1rem 0;max-width:100%;overflow-x:auto}
.scroll{overflow-x:auto;max-width:100%}th,td{overflow-wrap:break-word}
td.num{white-space:nowrap}th.group{text-align:center;border-bottom:1px solid #c9d0da}
th{font-weight:600;font-size:.86rem}.wide table{font-size:.82rem}
figcaption{margin-top:.2rem}.plotly-graph-div{max-width:100%}
@media print{body{margin:0;max-width:none}h2{break-after:avoid}table{break-inside:avoid}
.scroll{overflow:visible}figure{break-inside:avoid}}
"""


def _e(text) -> str:
    return html.escape("" if text is None else str(text))


def table_html(frame: pd.DataFrame, *, numeric=()) -> str:
    """A plain HTML table of a frame's values (escaped; ``numeric`` columns right-aligned)."""
    head = _header(list(map(str, frame.columns)))
    rows = []
    for rec in frame.itertuples(index=False):
        cells = []
        for col, v in zip(frame.columns, rec):
            cls = ' class="num"' if col in numeric else ""
            cells.append(f"<td{cls}>{_e(fmt(v) if isinstance(v, (float, np.floating)) else v)}"
                         "</td>")
        rows.append("<tr>" + "".join(cells) + "</tr>")
    wide = " wide" if len(frame.columns) > 7 else ""
    return (f'<div class="scroll{wide}"><table><thead>{head}</thead>'
            f"<tbody>{''.join(rows)}</tbody></table></div>")


def _header(columns: list[str]) -> str:
    """Header row(s): columns named "group: part" share a spanning group heading above."""
    split = [c.split(": ", 1) if ": " in c else [None, c] for c in columns]
    if all(g is None for g, _ in split):
        return "<tr>" + "".join(f"<th>{_e(c)}</th>" for c in columns) + "</tr>"
    top, i = [], 0
    while i < len(split):
        g = split[i][0]
        j = i
        while j < len(split) and split[j][0] == g:
            j += 1
        span = f' colspan="{j - i}"' if j - i > 1 else ""
        top.append(f'<th{span} class="group">{_e(g or "")}</th>')
        i = j
    return ("<tr>" + "".join(top) + "</tr><tr>"
            + "".join(f"<th>{_e(part)}</th>" for _, part in split) + "</tr>")


def _dict_table(d: dict, key="setting", value="value") -> str:
    frame = pd.DataFrame({key: list(d), value: [_plain_value(v) for v in d.values()]})
    return table_html(frame)


def _plain_value(v) -> str:
    if v is None:
        return "—"
    if isinstance(v, (list, tuple)):
        return ", ".join(str(x) for x in v) if v else "—"
    return str(v)


def _p(text, cls=None) -> str:
    c = f' class="{cls}"' if cls else ""
    return f"<p{c}>{_e(text)}</p>"


def lag_matrix_frame(lag) -> pd.DataFrame:
    """Lag-correlation matrix as 'r (n pairs)' cells, windows labelled by their edges."""
    w = lag.windows
    labels = [f"[{fmt(a, 3)}, {fmt(b, 3)})" for a, b in zip(w["lo"], w["hi"])]
    cells = [[(f"{fmt(r, 2)} (n={int(n)})" if np.isfinite(r) else f"— (n={int(n)})")
              for r, n in zip(row_r, row_n)] for row_r, row_n in zip(lag.matrix, lag.pairs)]
    frame = pd.DataFrame(cells, columns=labels)
    frame.insert(0, "window", labels)
    return frame


# --------------------------------------------------------------------------- the report
def x_description(cohort) -> str:
    """What the model term x means, e.g. 'x = log2(urine_protein_ratio) minus 4.347 (its median).'"""
    if cohort.covariate is None or cohort.x is None:
        return ""
    centre = cohort.settings.center
    if cohort.center_value is None or centre == "none":
        return f"x = {cohort.covariate_label} (not centred)."
    how = f"its {centre}" if isinstance(centre, str) else "the chosen value"
    return f"x = {cohort.covariate_label} minus {cohort.center_value:.4g} ({how})."


def build_report(cohort, exploration=None, models=None, *, data_name: str = "data",
                 data_key: str = "", choices=None, figures=(), chosen: str | None = None,
                 created: datetime | None = None, settings=None, plan=None,
                 plan_figure: str | None = None) -> str:
    """The whole analysis as one self-contained HTML document.

    Parameters
    ----------
    cohort : PreparedCohort
        Settings, roles, attrition, warnings and size.
    exploration : Exploration, optional
        From :meth:`analysis.pipeline.Workbench.explore`: stratum summary,
        semivariogram and lag correlations (sections left out when None).
    models : ModelSet, optional
        Fitted candidate models (the model sections say "not fitted" when None).
    data_name, data_key : str
        Display name and content fingerprint of the data.
    choices : ModelChoices, optional
        The model options, listed with the settings.
    figures : sequence of (place, caption, html) triples or (caption, html) pairs
        Figure snippets embedded as given (must not need the network), each in the part of
        the report its ``place`` names (:data:`FIGURE_PLACES`; pairs go after the
        exploration). The place "library" holds the plotting library itself, written once
        at the top; the other snippets must not carry their own copy.
    chosen : str, optional
        Model whose details are shown (default: the preferred model).
    created : datetime, optional
        Time stamp (default: now, UTC).
    settings : Settings, optional
        The request's settings for the settings table (default: the exploration's, else the
        cohort's, which hold only the fields its stage reads).
    plan : CohortPlan, optional
        A plan of the next study (:func:`analysis.models.plan_defaults.plan_from_cohort`), shown after
        the models when given.
    plan_figure : str, optional
        Self-contained HTML of its power curve.

    Returns
    -------
    str
        A complete HTML document.
    """
    created = created or datetime.now(timezone.utc)
    s = settings or (exploration.settings if exploration is not None else cohort.settings)
    unit = s.unit
    parts = [f"<h1>{_e(TITLE)}</h1>",
             _p(f"Data: {data_name} (content fingerprint {data_key or 'not given'})", "meta"),
             _p(f"Created {created.strftime('%Y-%m-%d %H:%M %Z').strip()}", "meta"),
             '<div class="caution">' + "".join(_p(c) for c in CAUTIONS) + "</div>"]

    # -- choices
    parts.append("<h2>Column roles and settings</h2>")
    placed = _placed(figures)
    parts[1:1] = placed.get("library", [])
    parts.append("<h3>Column roles</h3>" + table_html(roles_frame(cohort.roles)))
    parts.append("<h3>Settings</h3>" + table_html(settings_frame(s)))
    if choices is not None:
        parts.append("<h3>Model options</h3>" + table_html(choices_frame(choices)))

    # -- cohort
    parts.append("<h2>Who is analysed</h2>")
    parts.append(_p(f"{cohort.panel.n_subjects:,} subjects and {cohort.panel.n_obs:,} visits. "
                    f"Time: {cohort.time_label}. Primary covariate: "
                    f"{cohort.roles.label(cohort.covariate) or 'none'} (transform {s.transform}, centring "
                    f"{s.center}, centre value {fmt(cohort.center_value)} on the transformed "
                    "scale)."))
    att = cohort.attrition.to_frame().rename(columns={
        "step": "inclusion step", "subjects": "subjects kept", "observations": "visits kept",
        "subjects_removed": "subjects removed", "observations_removed": "visits removed"})
    parts.append(table_html(att, numeric=tuple(att.columns[1:])))
    parts.append("<h3>Warnings</h3>")
    parts.append("<ul>" + "".join(f"<li>{_e(w)}</li>" for w in cohort.warnings) + "</ul>"
                 if cohort.warnings else _p("None.", "note"))

    if exploration is not None:
        parts.append(_exploration_html(exploration, unit, placed))
    parts += placed.get("after-exploration", [])

    parts.append(_models_html(models, chosen=chosen, unit=unit, x_note=x_description(cohort),
                              placed=placed, cohort=cohort))
    if plan is not None:
        parts.append(plan_html(plan, unit=unit, figure=plan_figure))
    parts.append('<div class="caution">' + "".join(_p(c) for c in CAUTIONS) + "</div>")
    body = "\n".join(parts)
    return ("<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
            f"<title>{_e(TITLE)} — {_e(data_name)}</title><style>{CSS}</style></head>"
            f"<body>\n{body}\n</body></html>\n")


#: Where a figure can go in the report (``build_report(figures=...)``).
FIGURE_PLACES = ("library", "courses", "semivariogram", "lines", "rate", "followup",
                 "after-exploration", "models", "checks")
#: Page wording of the plan's inputs (its "where the inputs come from" table).
PLAN_INPUT_LABELS = {"model": "fitted model", "effect": "effect to detect",
                     "design": "design", "alpha": "significance level", "power": "target power",
                     "schedule": "planned visit times", "dropout_rate": "dropout rate",
                     "covariate": "covariate distribution"}
#: What the model-check figures show (report and page say the same).
CHECKS_NOTE = ("Standardised residuals: each subject's residuals from the population mean, "
               "y − Xβ̂, multiplied by the inverse Cholesky factor of that subject's fitted "
               "covariance; if the model is right they are independent standard normal draws "
               "(an even band about 0, points on the diagonal of the quantile plot). Predicted "
               "random effects are shrunk towards 0: their quantile plot is read for its shape, "
               "not its slope.")


def _placed(figures) -> dict:
    """{place: [HTML of each figure]} from (place, caption, html) triples or (caption, html)."""
    out: dict = {}
    for item in figures or ():
        place, caption, snippet = item if len(item) == 3 else ("after-exploration", *item)
        if place not in FIGURE_PLACES:
            raise ValueError(f"figure place {place!r} is not one of {FIGURE_PLACES}")
        html_ = snippet if place == "library" else (
            f"<figure>{snippet}<figcaption class=\"note\">{_e(caption)}</figcaption></figure>")
        out.setdefault(place, []).append(html_)
    return out


def checks_html(models, cohort, chosen: str, figures=()) -> str:
    """Model checks of the chosen model: the residuals' mean and SD in words, then the figures."""
    from ..errors import CohortError
    from ..models.checks import checks_for

    try:
        ch = checks_for(cohort, models, chosen)
    except CohortError as exc:
        return "\n".join([f"<h3>Model checks — {_e(chosen)}</h3>",
                          _p(f"Not available: {exc}", "note")])
    s = ch.summary()
    share = 100.0 * s["beyond_2"] / max(s["n_obs"], 1)
    out = [f"<h3>Model checks — {_e(ch.model)}</h3>",
           _p(f"Standardised residuals of {s['n_obs']:,} visits: mean {fmt(s['mean'], 3)}, "
              f"SD {fmt(s['sd'], 3)} (about 0 and 1 if the model is right); {share:.1f}% lie "
              f"beyond ±2 (about {100 * 2 * stats.norm.sf(2):.1f}% for standard normal draws)."),
           *figures, _p(CHECKS_NOTE, "note")]
    if not ch.serial:
        out.append(_p("This model has no serial process, so the subject's prediction is its "
                      "fixed effects plus its random effects.", "note"))
    return "\n".join(out)


def _exploration_html(ex, unit: str, placed=None) -> str:
    placed = placed or {}
    out = ["<h2>Groups of the baseline covariate</h2>"]
    strata = stratum_frame(ex.summaries.stratum_table, covariate=ex.cohort.covariate, unit=unit)
    shown = strata.copy()
    for c in shown.columns[1:]:
        shown[c] = [v if isinstance(v, str) else fmt(v, 4) for v in shown[c]]
    out.append(table_html(shown, numeric=tuple(shown.columns[1:])))
    if placed.get("courses"):
        out.append("<h2>Courses over time, by group</h2>")
        out += placed["courses"]
    vg = ex.variogram
    out.append("<h2>Semivariogram of the residuals</h2>")
    out += placed.get("semivariogram", [])
    out.append(_p(f"{ex.residuals.description.rstrip('.')}. "
                  f"{vg.n_pairs:,} within-subject pairs up to a lag of {fmt(vg.max_lag, 3)} "
                  f"{unit}; total residual (process) variance {fmt(vg.process_variance)}."))
    bins = vg.bins.rename(columns={"lag_lo": f"lag from ({unit})", "lag_hi": f"lag to ({unit})",
                                   "lag_mean": "mean lag", "gamma": "semivariance",
                                   "pairs": "pairs"})
    out.append(table_html(bins, numeric=tuple(bins.columns)))
    r = vg.readout
    sh = r.shares or {}

    def pct(k):
        v = sh.get(k)
        return "—" if v is None or not np.isfinite(v) else f"{100 * v:.0f}%"

    out.append(_p(f"Read-out: measurement error (nugget) {fmt(r.nugget)} ({pct('nugget')}), "
                  f"serially correlated variation {fmt(r.serial)} ({pct('serial')}), stable "
                  f"between-subject differences {fmt(r.between)} ({pct('between')})."))
    out += [_p(n, "note") for n in vg.notes]
    out.append(_p(vg.caveat, "note"))
    lc = ex.lag_correlation
    out.append("<h2>Correlation between a subject's visits</h2>")
    out.append(_p(f"Residual correlation between time windows {fmt(lc.width, 3)} {unit} wide; "
                  "each cell gives the correlation and the number of subjects seen in both "
                  "windows. Blank (—) where too few subjects.", "note"))
    out.append(table_html(lag_matrix_frame(lc)))
    if placed.get("lines"):
        out.append("<h2>Each subject's own straight line</h2>")
        out += placed["lines"]
    if placed.get("rate"):
        out.append("<h2>Rate of change and the baseline covariate</h2>")
        out += placed["rate"]
    out.append(_dropout_html(ex.summaries.dropout, unit, placed.get("followup", [])))
    return "\n".join(out)


def _dropout_html(d, unit: str, figures=()) -> str:
    """Loss to follow-up: the counts per status in the page's words, the rule, the table."""
    from ..exploration.summaries import BAND_METHOD, STATUSES

    h = d.horizon_text(unit)
    out = ["<h2>Visits and loss to follow-up</h2>", _p(d.sentence(unit)), *figures]
    if d.classified:
        names = {"left_early": f"left before {h}", "censored": f"had not reached {h}",
                 "complete": f"followed to {h}"}
        tab = d.count_table.drop(columns="stratum").rename(
            columns={"label": "group", **{s: names[s] for s in STATUSES}})
        out.append(table_html(tab, numeric=tuple(tab.columns[1:])))
        out.append(_p(f"Rule: {d.status_rule}. {d.horizon_rule}.", "note"))
        out.append(_p(f"Share not yet left: Kaplan–Meier, leaving at the last visit, others "
                      f"counted to their potential follow-up or the horizon; {BAND_METHOD}.",
                      "note"))
    out += [_p(n, "note") for n in d.notes]
    return "\n".join(out)


def _models_html(models, *, chosen, unit, x_note="", placed=None, cohort=None) -> str:
    placed = placed or {}
    out = ["<h2>Models</h2>"]
    if models is None:
        out.append(_p("No models were fitted for this report.", "note"))
        return "\n".join(out)
    t = model_tables(models, chosen, unit=unit)
    out.append(_p(models.mean.describe("the primary covariate (x)")))
    out.append(_p(f"{models.n_subjects:,} subjects and {models.n_obs:,} visits were used."))
    if t.small_sample:
        out.append(_p(t.small_sample, "warn"))
    out += [_p(n, "note") for n in models.notes]
    if models.effect is not None:
        e = models.effect
        out.append("<h3>Does the covariate change the rate of change?</h3>")
        out.append(f'<p class="effect">{_e(e.statement)}</p>')
        out.append(f'<p class="effect-alt">{_e(e.robust_statement)}</p>')
        out.append(_p(f"From {e.model}: {p_phrase(e.p)} (model-based), {p_phrase(e.robust_p)} "
                      f"(robust). {ASSOCIATION_NOTE}", "note"))
    else:
        out.append(_p("No time × covariate term in the model (no numeric primary covariate), so "
                      "there is no effect statement.", "note"))
    out.append("<h3>Comparison of working covariance structures</h3>")
    out.append(table_html(t.comparison))
    out += placed.get("models", [])
    out += [_p("At the boundary — " + n, "note") for n in t.boundary_notes]
    out.append(_p(PREFERRED_RULE, "note"))
    out.append(_p(t.method_note, "note"))
    if t.warning:
        out.append(_p("Caution: " + t.warning, "warn"))
    out.append("<h3>Likelihood-ratio tests of nested structures</h3>")
    out.append(table_html(t.lrt) if len(t.lrt) else _p("No nested pairs among the fits.", "note"))
    out.append(_p(MIXTURE_NOTE, "note"))
    out += [_p(n, "note") for n in t.lrt_notes]
    if t.chosen is not None:
        out.append(f"<h3>Fixed effects — {_e(t.chosen)}</h3>")
        out.append(table_html(t.fixed))
        out.append(_p(f"{x_note} Time in {unit}. 95% intervals and p-values: {t.reference}. "
                      "Robust SEs are the sandwich estimator clustered by subject with the "
                      "Mancl–DeRouen small-sample correction.".strip(), "note"))
        out.append(f"<h3>Variance parameters — {_e(t.chosen)}</h3>")
        out.append(table_html(t.variance))
    if t.chosen is not None and cohort is not None:
        out.append(checks_html(models, cohort, t.chosen, placed.get("checks", [])))
    if len(t.gee):
        out.append("<h3>GEE robustness rows</h3>")
        out.append(table_html(t.gee))
        out.append(_p("GEE with robust (sandwich) SEs, Mancl–DeRouen bias-reduced, t with "
                      "subjects − p df: the mean-model coefficients without trusting the "
                      "working covariance.", "note"))
    return "\n".join(out)


def per_unit(unit: str) -> str:
    """'months' → 'month' for "per month" (the time units are plural words)."""
    return unit[:-1] if unit.endswith("s") and len(unit) > 2 else unit


def plan_sentences(made, unit: str = "time unit") -> list[str]:
    """The plan's answer and its assumptions in words (the page and the report say the same)."""
    p, i = made.plan, made.inputs
    approx = str(p.assumptions["approximation"])
    per = per_unit(unit)
    groups = (f" ({p.per_group:,} per group)" if p.per_group else "")
    what = ("a difference in slopes between two equal groups of "
            f"{fmt(i.effect)} per {per}" if i.design == "two-groups" else
            f"a time × x coefficient of {fmt(i.effect)} (change in slope per {per} per unit "
            "of x on its analysis scale)")
    sched = ", ".join(fmt(t, 4) for t in i.schedule)
    return [
        f"{p.subjects_needed:,} subjects{groups} give {100 * p.achieved_power:.1f}% power to "
        f"detect {what} with a two-sided test at level {fmt(i.alpha)}.",
        f"Covariance: {made.model}. Visits at {sched} {unit}; dropout rate {fmt(i.dropout_rate)} "
        f"per {per} (constant hazard), so on average {fmt(p.expected_visits, 3)} of "
        f"{len(i.schedule)} visits are completed.",
        f"Standard error of the estimate at that size: {fmt(p.standard_error)}. "
        + approx[:1].upper() + approx[1:] + ".",
    ]


def plan_html(made, *, unit: str = "time unit", figure: str | None = None) -> str:
    """The plan of the next study: answer, per-model table, sources of the inputs, cautions."""
    out = ["<h2>Plan of the next study</h2>"]
    out += [_p(t) for t in plan_sentences(made, unit)]
    if figure:
        out.append(f"<figure>{figure}<figcaption class=\"note\">Power against the number of "
                   "subjects; the dashed line marks the target.</figcaption></figure>")
    out.append("<h3>Subjects needed under each fitted covariance</h3>")
    per = made.comparison.to_frame()[["name", "subjects_needed", "per_group", "standard_error",
                                      "error"]].rename(columns={
        "name": "model", "subjects_needed": "subjects needed", "per_group": "per group",
        "standard_error": "standard error", "error": "problem"})
    out.append(table_html(per, numeric=("subjects needed", "per group", "standard error")))
    out.append("<h3>Where the inputs come from</h3>" + _dict_table(
        {PLAN_INPUT_LABELS.get(k, k.replace("_", " ")): v for k, v in made.sources.items()},
        "input", "source"))
    per = per_unit(unit)
    out.append("<h3>Variance parameters assumed</h3>" + _dict_table(
        {VARIANCE_LABELS.get(k, k).format(unit=unit, per=per): fmt(v)
         for k, v in made.inputs.covariance.variance.items()}, "parameter"))
    out += [_p(n, "note") for n in made.notes]
    out.append('<div class="caution">' + "".join(_p(c) for c in made.plan.cautions) + "</div>")
    return "\n".join(out)
