"""Per-subject least-squares lines of the response on time, all subjects at once."""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from ..confidence import CONFIDENCE_LEVEL, t_quantile
from ..errors import SettingsError
from ..preparation.panel import Panel

#: reasons a subject's line lacks a slope or an interval
REASON_ONE_VISIT = "one visit"
REASON_SAME_TIME = "all visits at the same time"
REASON_TWO_VISITS = "two visits: no interval"

COLUMNS = ("subject", "n", "intercept", "intercept_se", "intercept_lo", "intercept_hi",
           "slope", "slope_se", "slope_lo", "slope_hi", "resid_sd", "has_interval", "reason")


@dataclass(frozen=True, eq=False)
class SubjectLines:
    """Ordinary least-squares line ``y = intercept + slope * time`` for each subject.

    All arrays have one entry per subject, in panel code order.

    Attributes
    ----------
    n : int64 array
        Visits of the subject.
    intercept : float array
        Fitted value at time 0 of the panel's time axis (time since origin).
        For a subject without a slope: the mean of its values.
    intercept_se, slope_se : float array
        Classical OLS standard errors (NaN when n <= 2 or no time spread).
    intercept_lo, intercept_hi, slope_lo, slope_hi : float array
        Two-sided t-intervals at ``level`` with n - 2 degrees of freedom.
    slope : float array
        Change in the response per unit of time (NaN with one visit or no time spread).
    resid_sd : float array
        Residual standard deviation ``sqrt(RSS / (n - 2))`` (NaN when n <= 2
        or no time spread).
    mean_time : float array
        Mean visit time of the subject (the point where intercept and slope
        estimates are uncorrelated).
    has_interval : bool array
        True when the intervals are defined (n >= 3 with time spread).
    reason : object array of str
        Why slope or interval is missing: "one visit", "all visits at the same
        time", "two visits: no interval", or "".
    level : float
        Confidence level of the intervals.
    """

    n: np.ndarray
    intercept: np.ndarray
    intercept_se: np.ndarray
    intercept_lo: np.ndarray
    intercept_hi: np.ndarray
    slope: np.ndarray
    slope_se: np.ndarray
    slope_lo: np.ndarray
    slope_hi: np.ndarray
    resid_sd: np.ndarray
    mean_time: np.ndarray
    has_interval: np.ndarray
    reason: np.ndarray
    level: float

    @property
    def n_subjects(self) -> int:
        return int(self.n.size)

    def to_frame(self, subject_ids=None) -> pd.DataFrame:
        """Tidy table, one row per subject.

        Parameters
        ----------
        subject_ids : array_like, optional
            Subject labels in panel code order; default the codes 0..m-1.

        Returns
        -------
        DataFrame
            Columns subject, n, intercept, intercept_se, intercept_lo,
            intercept_hi, slope, slope_se, slope_lo, slope_hi, resid_sd,
            has_interval, reason.
        """
        if subject_ids is None:
            subject = np.arange(self.n_subjects, dtype=np.int64)
        else:
            subject = (subject_ids if isinstance(subject_ids, pd.api.extensions.ExtensionArray)
                       else np.asarray(subject_ids))
            if subject.shape != (self.n_subjects,):
                raise ValueError(f"subject_ids has {subject.size} entries, expected one per "
                                 f"subject ({self.n_subjects})")
        data = {"subject": subject}
        for col in COLUMNS[1:]:
            data[col] = getattr(self, col)
        frame = pd.DataFrame(data)
        frame["reason"] = frame["reason"].astype(str)
        return frame


def fit_subject_lines(panel: Panel, *, level: float = CONFIDENCE_LEVEL) -> SubjectLines:
    """Fit ``y = a + b * time`` by OLS separately for every subject.

    Parameters
    ----------
    panel : Panel
        Group-sorted repeated measures.
    level : float, keyword-only
        Confidence level of the t-intervals, in (0, 1).

    Returns
    -------
    SubjectLines

    Notes
    -----
    With subject means ``t̄``, ``ȳ`` and centred time ``d = t - t̄`` (centring
    per subject avoids the cancellation of ``Σt² - n t̄²``)::

        Sxx = Σ d²,   b = Σ d (y - ȳ) / Sxx,   a = ȳ - b t̄
        s² = Σ (y - ȳ - b d)² / (n - 2)
        se(b) = sqrt(s² / Sxx),   se(a) = sqrt(s² (1/n + t̄² / Sxx))
        interval = estimate ± t_{(1+level)/2, n-2} · se

    All sums are ``np.add.reduceat`` over the subjects' row blocks.
    "No time spread" means first and last visit at the same time (rows are
    time-sorted within subject, so this test is exact).

    References
    ----------
    Fitzmaurice, Laird & Ware, *Applied Longitudinal Analysis*, 2nd ed.,
    section on two-stage (summary-statistic) analyses.
    """
    level = float(level)
    if not 0.0 < level < 1.0:
        raise SettingsError(f"level == {level}, must be between 0 and 1 (e.g. 0.95)")
    n = panel.counts.astype(np.int64)
    m = n.size
    if m == 0:
        empty = np.empty(0)
        return SubjectLines(n=n, intercept=empty, intercept_se=empty, intercept_lo=empty,
                            intercept_hi=empty, slope=empty, slope_se=empty, slope_lo=empty,
                            slope_hi=empty, resid_sd=empty, mean_time=empty,
                            has_interval=np.empty(0, dtype=bool),
                            reason=np.empty(0, dtype=object), level=level)
    t, y, starts, codes = panel.time, panel.y, panel.starts, panel.codes
    nf = n.astype(float)
    tbar = np.add.reduceat(t, starts) / nf
    ybar = np.add.reduceat(y, starts) / nf
    d = t - tbar[codes]
    e = y - ybar[codes]
    sxx = np.add.reduceat(d * d, starts)
    sxy = np.add.reduceat(d * e, starts)

    spread = t[starts + n - 1] > t[starts]
    has_slope = spread & (n >= 2)
    with np.errstate(divide="ignore", invalid="ignore"):
        slope = np.where(has_slope, sxy / np.where(has_slope, sxx, 1.0), np.nan)
        b_row = np.where(has_slope, slope, 0.0)[codes]
        rss = np.add.reduceat((e - b_row * d) ** 2, starts)
        has_interval = has_slope & (n >= 3)
        df = np.where(has_interval, nf - 2.0, np.nan)
        s2 = np.where(has_interval, rss / df, np.nan)
        slope_se = np.sqrt(s2 / np.where(has_slope, sxx, np.nan))
        intercept_se = np.sqrt(s2 * (1.0 / nf + tbar**2 / np.where(has_slope, sxx, np.nan)))
    intercept = np.where(has_slope, ybar - np.where(has_slope, slope, 0.0) * tbar, ybar)
    q = np.full(m, np.nan)
    q[has_interval] = t_quantile(df[has_interval], level)

    reason = np.full(m, "", dtype=object)
    reason[(n == 2) & spread] = REASON_TWO_VISITS
    reason[(n >= 2) & ~spread] = REASON_SAME_TIME
    reason[n == 1] = REASON_ONE_VISIT

    return SubjectLines(
        n=n,
        intercept=intercept,
        intercept_se=intercept_se,
        intercept_lo=intercept - q * intercept_se,
        intercept_hi=intercept + q * intercept_se,
        slope=slope,
        slope_se=slope_se,
        slope_lo=slope - q * slope_se,
        slope_hi=slope + q * slope_se,
        resid_sd=np.sqrt(s2),
        mean_time=tbar,
        has_interval=has_interval,
        reason=reason,
        level=level,
    )
