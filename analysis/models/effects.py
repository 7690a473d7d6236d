"""Plain-language statements of the time × covariate effect.

The interaction coefficient β₃ of y = β₀ + β₁t + β₂x + β₃·t·x + … is the
difference in the average rate of change (response units per time unit) per
one unit of the *transformed* covariate x. Read on the covariate's own scale:

* transform "none": per one-unit increase of the covariate;
* "log2": per doubling; "log10": per ten-fold increase;
* "log": per e-fold (×2.718) increase, and also per doubling, β₃·ln 2.
"""
from __future__ import annotations

import math
import re
from dataclasses import dataclass

import numpy as np

from ..errors import ModelError
from ..jsonsafe import json_safe
from ..numbers import format_number, parse_number  # noqa: F401  (parse_number: importable here as before)
from ..options import TRANSFORM_STEP, TRANSFORMS

#: The caution every statement ends with.
CAUTION = "This is an association in this cohort, not a causal effect."



@dataclass(frozen=True)
class EffectStep:
    """One way of reading the interaction on the covariate's own scale.

    Attributes
    ----------
    step : str
        e.g. "each doubling of".
    factor : float
        Multiplier turning β₃ into the slope change per that step.
    estimate, lo, hi : float
        β₃·factor and its interval.
    """

    step: str
    factor: float
    estimate: float
    lo: float
    hi: float


def effect_steps(estimate: float, lo: float, hi: float, *, transform: str) -> tuple[EffectStep, ...]:
    """Slope differences per natural step of the covariate.

    Parameters
    ----------
    estimate, lo, hi : float
        Interaction coefficient and its 95% interval (per unit of transformed x).
    transform : {"none", "log", "log2", "log10"}

    Returns
    -------
    tuple of EffectStep
        One entry; two for "log" (per e-fold, then per doubling with factor ln 2).

    Notes
    -----
    For x = log_b(c), multiplying c by b adds 1 to x, so the slope changes by
    β₃. For x = ln c, doubling c adds ln 2 to x: the slope changes by β₃·ln 2.
    """
    if transform not in TRANSFORMS:
        raise ModelError(f"transform == {transform!r}, must be one of {list(TRANSFORMS)}")
    steps = [EffectStep(TRANSFORM_STEP[transform], 1.0, float(estimate), float(lo), float(hi))]
    if transform == "log":
        f = math.log(2.0)
        steps.append(EffectStep(TRANSFORM_STEP["log2"], f, estimate * f, lo * f, hi * f))
    return tuple(steps)


def effect_statement(estimate: float, lo: float, hi: float, *, transform: str,
                     covariate_label: str, response_label: str, response_unit: str = "",
                     time_unit: str = "months", se_kind: str = "model-based",
                     mean_slope: float | None = None) -> str:
    """Plain-language sentence for the time × covariate coefficient.

    Parameters
    ----------
    estimate, lo, hi : float
        Interaction coefficient and its 95% interval, per unit of the transformed covariate.
    transform : {"none", "log", "log2", "log10"}
        Transform applied to the covariate before it entered the model.
    covariate_label : str
        The covariate's own name (untransformed), e.g. "baseline urine protein ratio".
        A wrapper such as "log2(marker)" is reduced to "marker".
    response_label, response_unit : str
        e.g. "eGFR", "mL/min/1.73m²".
    time_unit : str
        Plural time unit, e.g. "months".
    se_kind : str
        Which standard error made the interval, e.g. "model-based" or "robust".
    mean_slope : float, optional
        Average slope at the reference covariate value; when given, the
        direction is phrased as steeper/slower decline (mean slope < 0) or
        faster/slower rise (mean slope > 0).

    Returns
    -------
    str

    Examples
    --------
    With log2, estimate −0.04 (−0.06 to −0.02): "Each doubling of the marker is
    associated with a change in the eGFR slope of −0.04 mL/min/1.73m² per month
    (95% CI −0.06 to −0.02; model-based SE), i.e. a steeper decline. …"
    """
    vals = np.array([estimate, lo, hi], dtype=float)
    if not np.isfinite(vals).all():
        return (f"The change in the {response_label} slope with {_plain(covariate_label)} could "
                "not be estimated (non-finite estimate or interval).")
    if lo > hi:
        raise ModelError(f"interval lower end {lo:g} exceeds upper end {hi:g}")
    cov = _plain(covariate_label)
    unit = f" {response_unit}" if response_unit else ""
    per = f"per {_singular(time_unit)}"
    steps = effect_steps(estimate, lo, hi, transform=transform)
    first = steps[0]
    text = (f"{_cap(first.step)} {cov} is associated with a change in the {response_label} slope "
            f"of {format_number(first.estimate)}{unit} {per} (95% CI {format_number(first.lo)} to "
            f"{format_number(first.hi)}; {se_kind} SE)")
    for s in steps[1:]:
        text += (f"; equivalently, {s.step} {cov}: {format_number(s.estimate)}{unit} {per} "
                 f"(95% CI {format_number(s.lo)} to {format_number(s.hi)})")
    text += "."
    if lo <= 0 <= hi:
        text += (f" The interval includes 0: no clear evidence of a difference in slope "
                 f"across values of {cov}.")
    else:
        text += f" Higher {cov} goes with {direction_words(estimate, mean_slope)}."
    return f"{text} {CAUTION}"


def direction_words(estimate: float, mean_slope: float | None = None) -> str:
    """Direction of a slope difference in words.

    Parameters
    ----------
    estimate : float
        Slope difference (per step of the covariate).
    mean_slope : float, optional
        Average slope; its sign decides between "decline" and "rise" wording.

    Returns
    -------
    str
        e.g. "a steeper decline", "a slower decline", "a faster rise", "a slower rise",
        or without ``mean_slope`` "a more negative slope (steeper decline or slower rise)".
    """
    if mean_slope is None or mean_slope == 0 or not np.isfinite(mean_slope):
        return ("a more negative slope (steeper decline or slower rise)" if estimate < 0 else
                "a more positive slope (slower decline or faster rise)")
    if mean_slope < 0:
        return "a steeper decline" if estimate < 0 else "a slower decline"
    return "a faster rise" if estimate > 0 else "a slower rise"


@dataclass(frozen=True)
class InteractionSummary:
    """The time × covariate term of a fit, read both ways.

    Attributes
    ----------
    term : str
    transform : str
    estimate : float
    se, robust_se : float
        Model-based and sandwich standard errors.
    lo, hi, robust_lo, robust_hi : float
        95% Wald intervals.
    p, robust_p : float
        Two-sided Wald p-values.
    mean_slope : float or None
        Average slope at the reference covariate value (the "time" coefficient).
    statement, robust_statement : str
        Plain-language sentences with the model-based and the robust interval.
    model : str
        Label of the fit the numbers come from.
    """

    term: str
    transform: str
    estimate: float
    se: float
    robust_se: float
    lo: float
    hi: float
    robust_lo: float
    robust_hi: float
    p: float
    robust_p: float
    mean_slope: float | None
    statement: str
    robust_statement: str
    model: str = ""

    def to_json(self) -> dict:
        """Plain dict (JSON-safe; NaN → None)."""
        return json_safe(self.__dict__)


def interaction_summary(fit, *, term: str, transform: str, covariate_label: str,
                        response_label: str, response_unit: str = "",
                        time_unit: str = "months", slope_term: str | None = "time") -> InteractionSummary:
    """Model-based and robust readings of the interaction term of a fit.

    Parameters
    ----------
    fit
        Any fit with ``fixed_frame()`` giving term, estimate, se, robust_se, lo,
        hi, robust_lo, robust_hi, p, robust_p (e.g. :class:`analysis.models.mixed.MixedFit`).
    term : str
        The interaction term's name.
    transform, covariate_label, response_label, response_unit, time_unit
        As in :func:`effect_statement`.
    slope_term : str or None
        Term whose estimate is the average slope (for direction wording).

    Returns
    -------
    InteractionSummary

    Raises
    ------
    ModelError
        ``term`` is not among the fit's terms.
    """
    ff = fit.fixed_frame().set_index("term")
    if term not in ff.index:
        raise ModelError(f"term {term!r} is not in the model; terms are {list(ff.index)}")
    r = ff.loc[term]
    slope = None
    if slope_term is not None and slope_term in ff.index:
        slope = float(ff.loc[slope_term, "estimate"])
    kw = dict(transform=transform, covariate_label=covariate_label, response_label=response_label,
              response_unit=response_unit, time_unit=time_unit, mean_slope=slope)
    est = float(r["estimate"])
    return InteractionSummary(
        term=term, transform=transform, estimate=est, se=float(r["se"]),
        robust_se=float(r["robust_se"]), lo=float(r["lo"]), hi=float(r["hi"]),
        robust_lo=float(r["robust_lo"]), robust_hi=float(r["robust_hi"]), p=float(r["p"]),
        robust_p=float(r["robust_p"]), mean_slope=slope,
        statement=effect_statement(est, float(r["lo"]), float(r["hi"]), se_kind="model-based", **kw),
        robust_statement=effect_statement(est, float(r["robust_lo"]), float(r["robust_hi"]),
                                          se_kind="robust (sandwich)", **kw),
        model=str(getattr(fit, "label", "")),
    )


# --------------------------------------------------------------------------- formatting
def _singular(unit: str) -> str:
    unit = unit.strip()
    return unit[:-1] if unit.endswith("s") and len(unit) > 1 else unit


def _cap(s: str) -> str:
    return s[:1].upper() + s[1:]


_WRAP = re.compile(r"^\s*(?:log2|log10|log)\((.*)\)\s*$")


def _plain(label: str) -> str:
    m = _WRAP.match(label)
    return m.group(1) if m else label
