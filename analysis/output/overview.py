"""The answer first: a few numbers that say what a cohort is and what the models found.

:func:`cohort_overview` reads a prepared cohort (subjects, visits, follow-up, the primary
covariate and its groups); :func:`answer_overview` reads a fitted model set (the time ×
covariate effect with its interval and the preferred covariance structure). Both are pure and
vectorised over subjects (the panel's ``starts``/``counts``), no loop per subject.

Follow-up of a subject is the time of its last analysed visit after the origin (the chosen
time origin and window apply), in the cohort's time unit.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..jsonsafe import json_safe
from ..options import TRANSFORM_STEP


@dataclass(frozen=True)
class CohortOverview:
    """Who is analysed, in a handful of numbers.

    Attributes
    ----------
    subjects, visits : int
        Subjects and visits analysed.
    followup_median, followup_min, followup_max : float
        Median and range over subjects of the time of the last analysed visit (NaN with no
        subjects).
    time_unit : str
        e.g. "months".
    covariate : str or None
        The primary covariate's column (None when there is none).
    covariate_label : str
        As statements name it, e.g. "log2(urine_protein_ratio)".
    transform : str
    stratifier : str or None
        The column the groups are cut from.
    group_labels : tuple of str
        Group labels in group order.
    group_sizes : tuple of int
        Subjects per group, in the same order.
    no_value : int
        Subjects without a value of the stratifier (not in any group).
    """

    subjects: int
    visits: int
    followup_median: float
    followup_min: float
    followup_max: float
    time_unit: str
    covariate: str | None
    covariate_label: str
    transform: str
    stratifier: str | None
    group_labels: tuple[str, ...]
    group_sizes: tuple[int, ...]
    no_value: int

    def to_json(self) -> dict:
        d = dict(self.__dict__)
        d["group_labels"], d["group_sizes"] = list(self.group_labels), list(self.group_sizes)
        return json_safe(d)


@dataclass(frozen=True)
class AnswerOverview:
    """What the fitted models say about the rate of change, in one line.

    Attributes
    ----------
    preferred : str or None
        The preferred covariance structure (lowest AIC among converged fits).
    model : str
        The fit the effect comes from.
    step : str
        The covariate step the effect is per, e.g. "each doubling of" (empty without an effect).
    estimate, lo, hi : float
        Change in the response's slope per that step and its 95% interval (model-based SE);
        NaN when no time × covariate term was fitted.
    statement : str
        The full plain-language sentence (with its caution); "" without an effect.
    fitted : int
        Number of structures fitted successfully.
    """

    preferred: str | None
    model: str
    step: str
    estimate: float
    lo: float
    hi: float
    statement: str
    fitted: int

    @property
    def has_effect(self) -> bool:
        return bool(np.isfinite(self.estimate))

    def to_json(self) -> dict:
        return json_safe(dict(self.__dict__))


def last_visit_times(panel) -> np.ndarray:
    """Time of each subject's last visit (rows are time-sorted within subject)."""
    known = getattr(panel, "last_times", None)   # a Dask-served cohort: kept per subject
    if known is not None:
        return np.asarray(known, dtype=float)
    if panel.n_subjects == 0:
        return np.empty(0)
    return np.asarray(panel.time)[panel.starts + panel.counts - 1]


def cohort_overview(cohort) -> CohortOverview:
    """The cohort part of the summary strip from a :class:`PreparedCohort`."""
    panel = cohort.panel
    last = last_visit_times(panel)
    if last.size:
        med, lo, hi = float(np.median(last)), float(last.min()), float(last.max())
    else:
        med = lo = hi = float("nan")
    strata = cohort.strata
    settings = cohort.settings
    return CohortOverview(
        subjects=panel.n_subjects, visits=panel.n_obs,
        followup_median=med, followup_min=lo, followup_max=hi,
        time_unit=settings.unit, covariate=cohort.covariate,
        covariate_label=cohort.covariate_label if cohort.covariate else "",
        transform=settings.transform,
        stratifier=strata.name or None,
        group_labels=tuple(strata.labels),
        group_sizes=tuple(int(n) for n in strata.counts),
        no_value=int(np.sum(np.asarray(strata.codes) < 0)),
    )


def answer_overview(models) -> AnswerOverview:
    """The models part of the summary strip from a fitted model set."""
    e = models.effect
    nan = float("nan")
    if e is None:
        return AnswerOverview(preferred=models.preferred, model=models.preferred or "", step="",
                              estimate=nan, lo=nan, hi=nan, statement="",
                              fitted=len(models.fits))
    return AnswerOverview(preferred=models.preferred, model=e.model or models.preferred or "",
                          step=TRANSFORM_STEP.get(e.transform, ""), estimate=float(e.estimate),
                          lo=float(e.lo), hi=float(e.hi), statement=e.statement,
                          fitted=len(models.fits))
