"""Descriptive tables per stratum: covariate, visits and slopes; who leaves follow-up early.

Loops here run over strata or cohorts (a handful), never over subjects.
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import pandas as pd
from statsmodels.nonparametric.smoothers_lowess import lowess as _sm_lowess

from .errors import DataError, SettingsError
from .panel import Panel
from .strata import MISSING_LABEL, Strata, cut_strata

#: stratum code and label of the all-subjects row of the summary tables
ALL_CODE = -2
ALL_LABEL = "All subjects"
#: follow-up groups of the dropout view
LEFT_EARLY = "left before horizon"
FOLLOWED = "followed to horizon"
#: default horizon as a share of the largest observed time (a descriptive convention)
DEFAULT_HORIZON_SHARE = 0.9

STRATUM_COLUMNS = ("stratum", "label", "subjects", "observations", "cov_min", "cov_q1",
                   "cov_median", "cov_q3", "cov_max", "visits_mean", "visits_median",
                   "visits_min", "visits_max", "slope_q1", "slope_median", "slope_q3", "slope_n")


# --------------------------------------------------------------------------- stratum table
def stratum_table(panel: Panel, strata: Strata, covariate_raw, slopes) -> pd.DataFrame:
    """Covariate range, visit counts and per-subject slope spread in every stratum.

    Parameters
    ----------
    panel : Panel
    strata : Strata
        Stratum code per subject (panel code order).
    covariate_raw : array_like of float (n_subjects,)
        Untransformed covariate per subject (NaN = missing or categorical).
    slopes : array_like of float (n_subjects,)
        Per-subject OLS slope (NaN when a subject has none).

    Returns
    -------
    DataFrame
        One row per stratum 0..k-1 (empty strata included, with NaN
        statistics), then stratum -1 ("No value") when some subjects lack the
        stratifier, then stratum -2 ("All subjects"). Columns: stratum, label,
        subjects, observations, cov_min, cov_q1, cov_median, cov_q3, cov_max,
        visits_mean, visits_median, visits_min, visits_max, slope_q1,
        slope_median, slope_q3, slope_n (subjects with a slope).

    Notes
    -----
    Quartiles use linear interpolation between order statistics (numpy's
    and pandas' default). NaN values are left out of each statistic.
    """
    m = panel.n_subjects
    cov = _per_subject(covariate_raw, m, "covariate_raw")
    slope = _per_subject(slopes, m, "slopes")
    codes = _check_codes(strata, m)
    visits = panel.counts.astype(float)
    groups = _groups(strata, codes)
    rows = []
    for code, label, sel in groups:
        c, v, s = cov[sel], visits[sel], slope[sel]
        s = s[~np.isnan(s)]
        rows.append((code, label, int(sel.sum()), int(v.sum()), *_five(c),
                     _mean(v), *_five(v)[2:3], *_five(v)[0:1], *_five(v)[4:5],
                     *_five(s)[1:4], int(s.size)))
    return pd.DataFrame(rows, columns=list(STRATUM_COLUMNS))


def slope_covariate_smooth(covariate, slopes, *, frac: float = 0.6) -> pd.DataFrame:
    """Lowess curve of per-subject slope against the baseline covariate.

    Parameters
    ----------
    covariate, slopes : array_like of float (n_subjects,)
        Pairs with a NaN in either are dropped.
    frac : float, keyword-only
        Share of the points in each local fit, in (0, 1].

    Returns
    -------
    DataFrame
        Columns covariate, slope_smooth, one row per distinct covariate value,
        sorted; empty when fewer than 3 complete pairs.

    Notes
    -----
    statsmodels lowess with its default three robustness iterations, so that
    the wild slopes of subjects with two close visits pull the curve little.
    Above 2,000 subjects the local fits are computed on a grid 1% of the covariate's
    range apart and interpolated between (lowess's ``delta``; the speed-up the
    lowess literature recommends for large n), which changes the curve negligibly.
    """
    frac = float(frac)
    if not 0.0 < frac <= 1.0:
        raise SettingsError(f"frac == {frac}, must be in (0, 1]")
    x = np.asarray(covariate, dtype=float)
    y = np.asarray(slopes, dtype=float)
    if x.shape != y.shape:
        raise DataError(f"covariate has {x.size} values but slopes has {y.size}; "
                        f"expected one of each per subject")
    ok = np.isfinite(x) & np.isfinite(y)
    if ok.sum() < 3 or np.unique(x[ok]).size < 2:
        return pd.DataFrame({"covariate": np.empty(0), "slope_smooth": np.empty(0)})
    xo = x[ok]
    delta = 0.01 * float(np.ptp(xo)) if xo.size > 2000 else 0.0
    out = _sm_lowess(y[ok], xo, frac=frac, it=3, delta=delta, return_sorted=True)
    xs, idx = np.unique(out[:, 0], return_index=True)
    return pd.DataFrame({"covariate": xs, "slope_smooth": out[idx, 1]})


# --------------------------------------------------------------------------- dropout
@dataclass(frozen=True, eq=False)
class Dropout:
    """Who stops being followed before the horizon, and were they different before?

    Attributes
    ----------
    horizon : float
        Subjects whose last visit is before this time "left before horizon".
    horizon_rule : str
        How the horizon was chosen (for captions).
    subjects : DataFrame
        subject, stratum, last_time, last_response, left_early.
    by_stratum : DataFrame
        Response at the last visit per stratum and follow-up group: stratum,
        label, followup (``"left before horizon"`` / ``"followed to horizon"``),
        n, mean, sd, median. Strata 0..k-1, then -1 ("No value") if present,
        then -2 ("All subjects"); both follow-up groups always listed.
    profiles : DataFrame
        Mean response over time by dropout cohort (subjects grouped by
        quartiles of their last visit time): cohort, cohort_label, time_mid,
        mean_response, n (observations in the cell; empty cells omitted).
    """

    horizon: float
    horizon_rule: str
    subjects: pd.DataFrame
    by_stratum: pd.DataFrame
    profiles: pd.DataFrame

    @property
    def n_left_early(self) -> int:
        return int(self.subjects["left_early"].sum())

    def to_json(self) -> dict:
        """Plain dict (NaN as None) of the horizon and the three tables as lists of records."""
        return {
            "horizon": _plain(self.horizon),
            "horizon_rule": self.horizon_rule,
            "n_left_early": self.n_left_early,
            "subjects": _records(self.subjects),
            "by_stratum": _records(self.by_stratum),
            "profiles": _records(self.profiles),
        }


def dropout_summary(panel: Panel, strata: Strata, *, horizon: float | None = None,
                    subject_ids=None, n_time_bins: int = 10) -> Dropout:
    """Compare subjects who leave follow-up early with those followed to the horizon.

    Parameters
    ----------
    panel : Panel
    strata : Strata
        Stratum code per subject (panel code order).
    horizon : float, optional, keyword-only
        Time before which a last visit counts as leaving early. Default:
        ``DEFAULT_HORIZON_SHARE`` (90 %) of the largest observed time, a
        descriptive convention of this tool, not a statistical rule.
    subject_ids : array_like, optional
        Subject labels in panel code order for the ``subjects`` table
        (default the codes).
    n_time_bins : int
        Equal-width time bins, shared by all cohorts, for the profiles.

    Returns
    -------
    Dropout

    Notes
    -----
    Dropout cohorts are quartiles of the last visit time (ties can merge
    quartiles; then there are fewer cohorts). If the mean profiles of early
    leavers run below the others before they leave, dropout depends on the
    observed response, and analyses that ignore it (e.g. per-stratum means
    at late times) are biased; likelihood-based mixed models remain valid
    when dropout depends only on observed values (missing at random).

    References
    ----------
    Diggle, Heagerty, Liang & Zeger, *Analysis of Longitudinal Data*, 2nd ed.,
    chapter 13 (dropouts). Fitzmaurice, Laird & Ware, *Applied Longitudinal
    Analysis*, 2nd ed., chapter 17.
    """
    m = panel.n_subjects
    if m == 0:
        raise DataError("no subjects to summarise; check the inclusion rules")
    if isinstance(n_time_bins, bool) or not isinstance(n_time_bins, (int, np.integer)) \
            or n_time_bins < 1:
        raise SettingsError(f"n_time_bins == {n_time_bins!r}, must be an integer >= 1")
    codes = _check_codes(strata, m)
    last_row = panel.starts + panel.counts - 1
    last_time = panel.time[last_row]
    last_y = panel.y[last_row]
    t_max = float(panel.time.max())
    if horizon is None:
        horizon = DEFAULT_HORIZON_SHARE * t_max
        rule = (f"horizon = {DEFAULT_HORIZON_SHARE:.0%} of the longest follow-up "
                f"({_num(horizon)}; descriptive convention)")
    else:
        horizon = float(horizon)
        if not math.isfinite(horizon):
            raise SettingsError(f"horizon == {horizon}, must be a finite time")
        rule = f"horizon = {_num(horizon)} (chosen)"
    left = last_time < horizon
    ids = np.arange(m) if subject_ids is None else np.asarray(subject_ids)
    if ids.shape != (m,):
        raise DataError(f"subject_ids has {ids.size} entries, expected one per subject ({m})")
    subjects = pd.DataFrame({"subject": ids, "stratum": codes, "last_time": last_time,
                             "last_response": last_y, "left_early": left})

    groups = _groups(strata, codes)
    rows = []
    for code, label, sel in groups:
        for name, which in ((LEFT_EARLY, left), (FOLLOWED, ~left)):
            v = last_y[sel & which]
            rows.append((code, label, name, int(v.size), _mean(v),
                         float(np.std(v, ddof=1)) if v.size > 1 else math.nan, _five(v)[2]))
    by_stratum = pd.DataFrame(rows, columns=["stratum", "label", "followup", "n", "mean", "sd",
                                             "median"])
    profiles = _profiles(panel, last_time, int(n_time_bins))
    return Dropout(horizon=float(horizon), horizon_rule=rule, subjects=subjects,
                   by_stratum=by_stratum, profiles=profiles)


def _profiles(panel: Panel, last_time: np.ndarray, n_bins: int) -> pd.DataFrame:
    """Mean response per (dropout cohort, time bin), via one bincount."""
    cohorts = cut_strata(last_time, method="quantile", n=4, name="last visit")
    k = len(cohorts.labels)
    t = panel.time
    lo, hi = float(t.min()), float(t.max())
    edges = np.linspace(lo, hi, n_bins + 1) if hi > lo else np.array([lo, lo + 1.0])
    nb = edges.size - 1
    b = np.clip(np.searchsorted(edges, t, side="right") - 1, 0, nb - 1)
    key = cohorts.codes[panel.codes] * nb + b
    n = np.bincount(key, minlength=k * nb)
    total = np.bincount(key, weights=panel.y, minlength=k * nb)
    cell = np.flatnonzero(n)
    mids = (edges[:-1] + edges[1:]) / 2.0
    labels = np.asarray([f"last visit {lab}" for lab in cohorts.labels], dtype=object)
    return pd.DataFrame({
        "cohort": (cell // nb).astype(np.int64),
        "cohort_label": labels[cell // nb].astype(str),
        "time_mid": mids[cell % nb],
        "mean_response": total[cell] / n[cell],
        "n": n[cell].astype(np.int64),
    })


# --------------------------------------------------------------------------- helpers
def _per_subject(values, m: int, what: str) -> np.ndarray:
    v = np.asarray(values, dtype=float)
    if v.shape != (m,):
        raise DataError(f"{what} has {v.size} values, expected one per subject ({m})")
    return v


def _groups(strata, codes: np.ndarray) -> list[tuple[int, str, np.ndarray]]:
    """(code, label, subject mask) per stratum, then "No value" if any, then all subjects."""
    groups = [(j, lab, codes == j) for j, lab in enumerate(strata.labels)]
    if np.any(codes == -1):
        groups.append((-1, MISSING_LABEL, codes == -1))
    groups.append((ALL_CODE, ALL_LABEL, np.ones(codes.size, dtype=bool)))
    return groups


def _check_codes(strata: Strata, m: int) -> np.ndarray:
    codes = np.asarray(strata.codes, dtype=np.int64)
    if codes.shape != (m,):
        raise DataError(f"strata cover {codes.size} subjects, but the panel has {m}")
    return codes


def _five(x: np.ndarray) -> tuple[float, float, float, float, float]:
    """min, q1, median, q3, max of the non-NaN values (NaN when there are none)."""
    x = np.asarray(x, dtype=float)
    x = x[~np.isnan(x)]
    if x.size == 0:
        return (math.nan,) * 5
    return tuple(float(q) for q in np.quantile(x, [0.0, 0.25, 0.5, 0.75, 1.0]))


def _mean(x: np.ndarray) -> float:
    x = np.asarray(x, dtype=float)
    x = x[~np.isnan(x)]
    return float(x.mean()) if x.size else math.nan


def _num(x: float) -> str:
    return f"{x:.4g}"


def _plain(v):
    if isinstance(v, (np.integer,)):
        return int(v)
    if isinstance(v, (np.bool_,)):
        return bool(v)
    if isinstance(v, (float, np.floating)):
        return None if math.isnan(v) else float(v)
    return v


def _records(frame: pd.DataFrame) -> list[dict]:
    cols = {c: [_plain(v) for v in frame[c].tolist()] for c in frame.columns}
    return [{c: cols[c][i] for c in frame.columns} for i in range(len(frame))]
