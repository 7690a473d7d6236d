"""Descriptive tables per stratum: covariate, visits and slopes; who leaves follow-up early.

Loops here run over strata or cohorts (a handful), never over subjects.
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy import stats
from statsmodels.nonparametric.smoothers_lowess import lowess as _sm_lowess

from ..confidence import CONFIDENCE_LEVEL, upper_tail, z_quantile
from ..errors import DataError, SettingsError
from ..jsonsafe import json_safe
from .lagbins import edge_bin, equal_width_bins
from ..numbers import plain_number
from ..preparation.panel import Panel
from ..preparation.strata import MISSING_LABEL, Strata, cut_strata

#: stratum code and label of the all-subjects row of the summary tables
ALL_CODE = -2
ALL_LABEL = "All subjects"
#: default horizon as a share of the largest observed time (a descriptive convention)
DEFAULT_HORIZON_SHARE = 0.9

STRATUM_COLUMNS = ("stratum", "label", "subjects", "observations", "cov_min", "cov_q1",
                   "cov_median", "cov_q3", "cov_max", "visits_mean", "visits_median",
                   "visits_min", "visits_max", "slope_q1", "slope_median", "slope_q3", "slope_n",
                   "slope_median_lo", "slope_median_hi")


# --------------------------------------------------------------------------- stratum table
def stratum_column_labels(covariate: str | None, unit: str) -> dict[str, tuple[str, str]]:
    """Reader's names of the group table's columns: column → (heading, name), e.g.
    ``"slope_median_lo"`` → ``("slope per month", "95% CI of the median: from")``; the page's
    two-row table headers and the report's ``heading: name`` columns both read it. The
    internal ``stratum`` code has none (it is never shown)."""
    cov = covariate or "covariate"
    per = f"slope per {unit[:-1] if unit.endswith('s') and len(unit) > 2 else unit}"
    ci = f"{round(100 * CONFIDENCE_LEVEL)}% CI of the median"
    return {
        "label": ("", "group"), "subjects": ("", "subjects"), "observations": ("", "visits"),
        "cov_min": (cov, "min"), "cov_q1": (cov, "lower quartile"), "cov_median": (cov, "median"),
        "cov_q3": (cov, "upper quartile"), "cov_max": (cov, "max"),
        "visits_mean": ("visits per subject", "mean"),
        "visits_median": ("visits per subject", "median"),
        "visits_min": ("visits per subject", "min"), "visits_max": ("visits per subject", "max"),
        "slope_q1": (per, "lower quartile"), "slope_median": (per, "median"),
        "slope_q3": (per, "upper quartile"), "slope_n": (per, "subjects with one"),
        "slope_median_lo": (per, f"{ci}: from"), "slope_median_hi": (per, f"{ci}: to"),
    }


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
        slope_median, slope_q3, slope_n (subjects with a slope), slope_median_lo,
        slope_median_hi (distribution-free confidence interval of the median slope,
        :func:`median_interval`).

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
                     *_five(s)[1:4], int(s.size), *median_interval(s)))
    return pd.DataFrame(rows, columns=list(STRATUM_COLUMNS))


def median_interval(values, level: float = CONFIDENCE_LEVEL) -> tuple[float, float]:
    """Distribution-free confidence interval of a median: a pair of order statistics.

    With n values sorted, the interval is ``(x_(j), x_(n−j+1))`` (1-based) for the largest j
    whose binomial tail ``P(B ≤ j − 1)``, B ~ Binomial(n, ½), is at most ``(1 − level)/2``;
    its coverage is ``1 − 2 P(B ≤ j − 1) ≥ level`` for any continuous distribution
    (the sign-test interval; Conover, *Practical Nonparametric Statistics*, §3.2).
    NaN values are left out; (NaN, NaN) when no such j exists (n < 6 at 95%).
    """
    x = np.sort(np.asarray(values, dtype=float))
    x = x[~np.isnan(x)]
    n = x.size
    if n == 0:
        return (math.nan, math.nan)
    tail = 1.0 - upper_tail(level)                      # (1 − level) / 2
    # j − 1 = the largest k with P(B ≤ k) ≤ tail
    k = int(stats.binom.ppf(tail, n, 0.5))              # smallest k with P(B ≤ k) ≥ tail
    if stats.binom.cdf(k, n, 0.5) > tail:
        k -= 1
    j = k + 1
    if j < 1:
        return (math.nan, math.nan)
    return (float(x[j - 1]), float(x[n - j]))


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
#: follow-up status of a subject against the horizon
LEFT_EARLY_STATUS = "left_early"
CENSORED_STATUS = "censored"
COMPLETE_STATUS = "complete"
STATUSES = (LEFT_EARLY_STATUS, CENSORED_STATUS, COMPLETE_STATUS)
#: groups of the last-visit comparison (left early against everyone else)
LEFT_EARLY = "left early"
FOLLOWED = "did not leave"
LAST_VISIT = "last visit"
#: a subject has left early when its last visit lies more than this many typical gaps before
#: the horizon and before the end of its potential follow-up (a convention of this tool: with
#: one gap, every subject who missed the visit just before the data end would count as leaving)
OVERDUE_GAPS = 2.0
#: two-sided level of the retention band
BAND_LEVEL = CONFIDENCE_LEVEL
BAND_METHOD = ("95% pointwise band from Greenwood's variance on the log(−log) scale, "
               "after Kalbfleisch & Prentice")
RETENTION_COLUMNS = ("stratum", "label", "time", "retained", "lo", "hi", "at_risk", "left")


@dataclass(frozen=True, eq=False)
class Dropout:
    """Who stops being followed before the horizon, told apart from the end of the data.

    Attributes
    ----------
    horizon : float
        The time the statuses are judged against.
    horizon_rule : str
        How the horizon was chosen (for captions).
    classified : bool
        False when no potential follow-up is known (numeric times without a follow-up end):
        then leaving early cannot be told apart from the end of the data, ``status`` is empty
        and the retention curve is the share of subjects with a visit at or after each time.
    typical_gap : float
        Median time between a subject's consecutive visits, over all subjects (NaN without any).
    status_rule : str
        The classification rule in words, with its numbers.
    followup_source : str
        Where the potential follow-up comes from, e.g. "data cut 2023-06-30 (latest visit date
        in the file)" ('' when not classified).
    subjects : DataFrame
        subject (id as in the data), stratum, last_time, last_response, potential_followup
        (NaN when unknown), status (``"left_early"``, ``"censored"``, ``"complete"``; None when
        not classified), left_early.
    counts : dict
        Subjects per status (all subjects); empty when not classified.
    count_table : DataFrame
        stratum, label and one column of subjects per status; strata then -1 then -2.
    retention : DataFrame
        Kaplan–Meier share not yet left: stratum, label, time, retained, lo, hi, at_risk, left.
        One row at time 0, one per time with leavers, and one at the last time followed.
    by_stratum : DataFrame
        Response at the last visit per stratum and group: stratum, label, followup
        (``"left early"`` / ``"did not leave"``; ``"last visit"`` when not classified), n, mean,
        sd, median. Strata 0..k-1, then -1 ("No value") if present, then -2 ("All subjects").
    profiles : DataFrame
        Mean response over time by dropout cohort (subjects grouped by quartiles of their last
        visit time): cohort, cohort_label, time_mid, mean_response, n.
    notes : tuple of str
    """

    horizon: float
    horizon_rule: str
    classified: bool
    typical_gap: float
    status_rule: str
    followup_source: str
    subjects: pd.DataFrame
    counts: dict
    count_table: pd.DataFrame
    retention: pd.DataFrame
    by_stratum: pd.DataFrame
    profiles: pd.DataFrame
    notes: tuple = ()

    @property
    def n_left_early(self) -> int:
        return int(self.subjects["left_early"].sum())

    def horizon_text(self, time_unit: str = "") -> str:
        """The horizon as the page and the report write it, e.g. '54 months'."""
        h = self.horizon
        num = f"{h:.3g}" if 1e-3 <= abs(h) < 1000 else f"{h:,.0f}"
        return f"{num} {time_unit}".strip()

    def sentence(self, time_unit: str = "") -> str:
        """The counts per status in plain words (the page note and the report say the same)."""
        h = self.horizon_text(time_unit)
        if not self.classified:
            return (f"Leaving early cannot be told apart from the end of the data: the time "
                    "column holds numbers and no follow-up end column is given, so the curve "
                    f"shows only when each subject's last visit was ({len(self.subjects):,} "
                    "subjects).")
        c = self.counts
        return (f"{c[LEFT_EARLY_STATUS]:,} left before {h}; {c[CENSORED_STATUS]:,} had not "
                f"reached {h} when the data end ({self.followup_source}); "
                f"{c[COMPLETE_STATUS]:,} followed to {h}.")

    def to_json(self) -> dict:
        """Plain dict (NaN as None) of the horizon, the rule, the counts and the tables."""
        return {
            "horizon": json_safe(self.horizon),
            "horizon_rule": self.horizon_rule,
            "classified": self.classified,
            "typical_gap": json_safe(self.typical_gap),
            "status_rule": self.status_rule,
            "followup_source": self.followup_source,
            "band": BAND_METHOD,
            "n_left_early": self.n_left_early,
            "counts": {k: int(v) for k, v in self.counts.items()},
            "count_table": _records(self.count_table),
            "subjects": _records(self.subjects),
            "retention": _records(self.retention),
            "by_stratum": _records(self.by_stratum),
            "profiles": _records(self.profiles),
            "notes": list(self.notes),
        }


def retention_curve(time, left) -> pd.DataFrame:
    """Kaplan–Meier share not yet left, with a 95% log(−log) Greenwood band.

    Parameters
    ----------
    time : array_like of float
        Time of leaving (``left`` true) or of censoring.
    left : array_like of bool

    Returns
    -------
    DataFrame
        time, retained, lo, hi, at_risk (just before the time), left (events at the time):
        a first row at time min(0, first time) with retained 1, one row per distinct time with
        leavers, and a last row at the largest time when it has no leavers.

    Notes
    -----
    S(t) = Π (1 − d_j / n_j); Greenwood: Var S = S² Σ d_j / (n_j (n_j − d_j)). The band is
    exp(−exp(log(−log S) ± 1.96 se)) with se = √(Σ d/(n(n−d))) / |log S|, which stays within
    [0, 1]; where S = 0 the band is [0, 0]. One np.unique and two bincounts, no loop.

    References
    ----------
    Kaplan & Meier (1958), JASA 53:457–481. Kalbfleisch & Prentice, *The Statistical
    Analysis of Failure Time Data*, 2nd ed., §1.4.
    """
    t = np.asarray(time, dtype=float)
    e = np.asarray(left, dtype=bool)
    if t.size == 0:
        return pd.DataFrame({c: [] for c in RETENTION_COLUMNS[2:]})
    ut, inv = np.unique(t, return_inverse=True)
    d = np.bincount(inv, weights=e.astype(float), minlength=ut.size)
    n = np.cumsum(np.bincount(inv, minlength=ut.size)[::-1])[::-1].astype(float)
    k = d > 0
    te, de, ne = ut[k], d[k], n[k]
    s = np.cumprod(1.0 - de / ne)
    with np.errstate(divide="ignore", invalid="ignore"):
        gw = np.cumsum(np.where(ne > de, de / (ne * (ne - de)), np.inf))
        z = z_quantile(BAND_LEVEL)
        log_s = np.log(s)
        theta = np.log(-log_s)
        se = np.sqrt(gw) / np.abs(log_s)
        lo = np.exp(-np.exp(theta + z * se))
        hi = np.exp(-np.exp(theta - z * se))
    dead = s <= 0
    lo[dead], hi[dead] = 0.0, 0.0
    start = min(0.0, float(ut[0]))
    rows = {"time": np.r_[start, te], "retained": np.r_[1.0, s], "lo": np.r_[1.0, lo],
            "hi": np.r_[1.0, hi], "at_risk": np.r_[float(t.size), ne], "left": np.r_[0.0, de]}
    if not k[-1]:
        for c, v in (("time", ut[-1]), ("at_risk", n[-1]), ("left", 0.0)):
            rows[c] = np.r_[rows[c], v]
        for c in ("retained", "lo", "hi"):
            rows[c] = np.r_[rows[c], rows[c][-1]]
    out = pd.DataFrame(rows)
    out["at_risk"] = out["at_risk"].astype(np.int64)
    out["left"] = out["left"].astype(np.int64)
    return out


def dropout_summary(panel: Panel, strata: Strata, *, horizon: float | None = None,
                    subject_ids=None, n_time_bins: int = 10, potential_followup=None,
                    followup_source: str = "", overdue_gaps: float = OVERDUE_GAPS,
                    notes=(), time_unit: str = "") -> Dropout:
    """Tell subjects who left follow-up early from those the data end before the horizon.

    Parameters
    ----------
    panel : Panel
    strata : Strata
        Stratum code per subject (panel code order).
    horizon : float, optional, keyword-only
        Time the statuses are judged against. Default: ``DEFAULT_HORIZON_SHARE`` (90 %) of
        the largest observed time, a descriptive convention of this tool.
    subject_ids : array_like, optional
        Subject labels in panel code order (default the codes).
    n_time_bins : int
        Equal-width time bins, shared by all cohorts, for the profiles.
    potential_followup : array_like of float (n_subjects,), optional
        Time from each subject's origin to the end of its possible follow-up (data cut or
        its own follow-up end), in the panel's time unit. None: unknown, so no subject is
        classified (see ``Dropout.classified``).
    followup_source : str
        Where ``potential_followup`` comes from, for the wording.
    overdue_gaps : float
        How many typical gaps without a visit count as leaving (default ``OVERDUE_GAPS``).
    notes : sequence of str
        Passed through to the result.
    time_unit : str
        Unit word for the rule's wording (e.g. "months").

    Returns
    -------
    Dropout

    Notes
    -----
    The typical gap g is the median of all within-subject gaps between consecutive visits.
    With P = potential follow-up (raised to the last visit when a visit lies after it) and
    last visit L: *left early* when L < min(horizon, P) − ``overdue_gaps``·g; otherwise
    *censored* when P < horizon, else *complete*. Retention is Kaplan–Meier: leaving at L
    for those who left, censored at min(P, horizon) for the others (each subject who did not
    leave is followed to its potential follow-up).

    Without a potential follow-up the retention curve treats every last visit as the end (the
    share with a visit at or after t), which mixes leaving with the end of the data.

    References
    ----------
    Diggle, Heagerty, Liang & Zeger, *Analysis of Longitudinal Data*, 2nd ed., ch. 13.
    Kaplan & Meier (1958).
    """
    m = panel.n_subjects
    if m == 0:
        raise DataError("no subjects to summarise; check the inclusion rules")
    if isinstance(n_time_bins, bool) or not isinstance(n_time_bins, (int, np.integer)) \
            or n_time_bins < 1:
        raise SettingsError(f"n_time_bins == {n_time_bins!r}, must be an integer >= 1")
    overdue_gaps = float(overdue_gaps)
    if not overdue_gaps >= 0:
        raise SettingsError(f"overdue_gaps == {overdue_gaps}, must be >= 0")
    _check_codes(strata, m)
    last_row = panel.starts + panel.counts - 1
    same = np.diff(panel.codes) == 0
    gaps = np.diff(panel.time)[same]
    return dropout_from_subjects(
        panel.time[last_row], panel.y[last_row], strata, t_max=float(panel.time.max()),
        typical_gap=float(np.median(gaps)) if gaps.size else math.nan,
        profiles=lambda last_time, nb: _profiles(panel, last_time, nb), horizon=horizon,
        subject_ids=subject_ids, n_time_bins=n_time_bins, potential_followup=potential_followup,
        followup_source=followup_source, overdue_gaps=overdue_gaps, notes=notes,
        time_unit=time_unit)


def dropout_from_subjects(last_time, last_y, strata: Strata, *, t_max: float,
                          typical_gap: float, profiles, horizon=None, subject_ids=None,
                          n_time_bins: int = 10, potential_followup=None,
                          followup_source: str = "", overdue_gaps: float = OVERDUE_GAPS,
                          notes=(), time_unit: str = "") -> Dropout:
    """:func:`dropout_summary` from per-subject last visits, the latest time, the typical gap
    (median within-subject gap) and ``profiles(last_time, n_time_bins)`` (the mean-response
    profiles frame, a sum over visits); the cluster engine computes these from partitions."""
    m = int(np.asarray(last_time).size)
    overdue_gaps = float(overdue_gaps)
    codes = _check_codes(strata, m)
    last_time = np.asarray(last_time, dtype=float)
    last_y = np.asarray(last_y, dtype=float)
    if horizon is None:
        horizon = DEFAULT_HORIZON_SHARE * t_max
        rule = (f"horizon = {DEFAULT_HORIZON_SHARE:.0%} of the longest follow-up "
                f"({plain_number(horizon, '.4g')}; descriptive convention)")
    else:
        horizon = float(horizon)
        if not math.isfinite(horizon):
            raise SettingsError(f"horizon == {horizon}, must be a finite time")
        rule = f"horizon = {plain_number(horizon, '.4g')} (chosen)"
    ids = (np.arange(m) if subject_ids is None else subject_ids
           if isinstance(subject_ids, pd.api.extensions.ExtensionArray) else np.asarray(subject_ids))
    if ids.shape != (m,):
        raise DataError(f"subject_ids has {ids.size} entries, expected one per subject ({m})")
    gap = typical_gap
    notes = list(notes)
    classified = potential_followup is not None
    if classified:
        pot = _per_subject(potential_followup, m, "potential_followup")
        after = np.isnan(pot) | (pot < last_time)
        if after.any():
            notes.append(f"{int(after.sum()):,} subject(s) have visits after the end of their "
                         "potential follow-up (or none is known); it is taken as their last visit.")
        pot = np.where(after, last_time, pot)
        slack = overdue_gaps * (gap if math.isfinite(gap) else 0.0)
        left = last_time < np.minimum(horizon, pot) - slack
        # status as its index in STATUSES (counted as integers), then as text
        status_code = np.where(left, 0, np.where(pot < horizon, 1, 2))
        status = np.asarray(STATUSES, dtype=object)[status_code]
        times = np.where(left, last_time, np.minimum(pot, horizon))
        events = left
        status_rule = (
            f"left early = last visit more than {plain_number(overdue_gaps, '.4g')} typical gaps "
            f"({plain_number(overdue_gaps, '.4g')} × {gap:.3g} = {slack:.3g} {time_unit}".rstrip()
            + "; typical gap = median time "
            "between a subject's consecutive visits) before the horizon and before the end of "
            "the subject's potential follow-up; censored = potential follow-up ends before the "
            "horizon with no sign of leaving; complete = followed to the horizon")
    else:
        pot = np.full(m, np.nan)
        left = np.zeros(m, dtype=bool)
        status = np.full(m, None, dtype=object)
        status_code = np.full(m, -1)
        times, events = last_time, np.ones(m, dtype=bool)
        status_rule = ("not classified: without calendar dates or a follow-up end column, "
                       "leaving early cannot be told apart from the end of the data")
    subjects = pd.DataFrame({"subject": ids, "stratum": codes, "last_time": last_time,
                             "last_response": last_y, "potential_followup": pot,
                             "status": status, "left_early": left})

    groups = _groups(strata, codes)
    rows, curves, count_rows = [], [], []
    split = ((LEFT_EARLY, left), (FOLLOWED, ~left)) if classified else ((LAST_VISIT, ~left),)
    for code, label, sel in groups:
        for name, which in split:
            v = last_y[sel & which]
            rows.append((code, label, name, int(v.size), _mean(v),
                         float(np.std(v, ddof=1)) if v.size > 1 else math.nan, _five(v)[2]))
        if sel.any():
            curve = retention_curve(times[sel], events[sel])
            curve.insert(0, "label", label)
            curve.insert(0, "stratum", code)
            curves.append(curve)
        if classified:
            per = np.bincount(status_code[sel], minlength=len(STATUSES))
            count_rows.append((code, label, *(int(n) for n in per)))
    by_stratum = pd.DataFrame(rows, columns=["stratum", "label", "followup", "n", "mean", "sd",
                                             "median"])
    retention = pd.concat(curves, ignore_index=True)[list(RETENTION_COLUMNS)]
    count_table = pd.DataFrame(count_rows, columns=["stratum", "label", *STATUSES])
    counts = ({s: int(n) for s, n in zip(STATUSES, np.bincount(status_code,
                                                            minlength=len(STATUSES)))}
              if classified else {})
    profiles = profiles(last_time, int(n_time_bins))
    return Dropout(horizon=float(horizon), horizon_rule=rule, classified=classified,
                   typical_gap=gap, status_rule=status_rule,
                   followup_source=followup_source if classified else "", subjects=subjects,
                   counts=counts, count_table=count_table, retention=retention,
                   by_stratum=by_stratum, profiles=profiles, notes=tuple(notes))


def cohort_dropout(cohort, *, data_cut: str | None = None, horizon: float | None = None
                   ) -> Dropout:
    """:func:`dropout_summary` of a prepared cohort: subject ids as in the data and each
    subject's potential follow-up from its origin to the data cut (or its follow-up end)."""
    basis = cohort.selection.followup
    pot, source, notes = (basis.potential(data_cut=data_cut, time_max=cohort.settings.time_max)
                          if basis is not None else (None, "", ()))
    return dropout_summary(cohort.panel, cohort.strata, horizon=horizon,
                           subject_ids=cohort.baseline["subject"].array, potential_followup=pot,
                           followup_source=source, notes=notes, time_unit=cohort.settings.unit)


def _profiles(panel: Panel, last_time: np.ndarray, n_bins: int) -> pd.DataFrame:
    """Mean response per (dropout cohort, time bin), via one bincount."""
    cohorts = profile_cohorts(last_time)
    edges, _ = equal_width_bins(panel.time, n_bins)
    n, total = profile_sums(panel, cohorts.codes, edges, len(cohorts.labels))
    return profile_frame(cohorts, edges, n, total)


def profile_cohorts(last_time: np.ndarray) -> Strata:
    """Subjects cut into quartiles of their last visit time (the profiles' cohorts)."""
    return cut_strata(last_time, method="quantile", n=4, name="last visit")


def profile_sums(panel: Panel, cohort_codes: np.ndarray, edges: np.ndarray, k: int):
    """(visits, response sum) per (cohort, time bin) cell, additive over sets of subjects;
    ``cohort_codes`` per subject of the panel, ``edges`` the bins over every visit time."""
    nb = edges.size - 1
    key = cohort_codes[panel.codes] * nb + edge_bin(panel.time, edges)
    n = np.bincount(key, minlength=k * nb)
    total = np.bincount(key, weights=panel.y, minlength=k * nb)
    return n, total


def profile_frame(cohorts: Strata, edges: np.ndarray, n: np.ndarray, total: np.ndarray
                  ) -> pd.DataFrame:
    nb = edges.size - 1
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


def _records(frame: pd.DataFrame) -> list[dict]:
    cols = {c: json_safe(frame[c].tolist()) for c in frame.columns}
    return [{c: cols[c][i] for c in frame.columns} for i in range(len(frame))]


# --------------------------------------------------------------------------- figure summaries
#: time bins for the group mean curves over time, and the fewest visits a bin needs
MEAN_BINS = 12
MEAN_MIN_VISITS = 5


def label_positions(frame: pd.DataFrame, strata) -> np.ndarray:
    """Position of each row's ``stratum_label`` in ``strata`` (-1 where it is not there).

    A categorical label column is read through its codes: one text comparison per category,
    not per row (text work on a million visit rows is otherwise the slow part).
    """
    lab = frame["stratum_label"]
    if isinstance(lab.dtype, pd.CategoricalDtype):
        pos = {str(v): i for i, v in enumerate(strata)}
        lut = np.array([pos.get(str(c), -1) for c in lab.cat.categories] + [-1], dtype=np.int64)
        return lut[lab.cat.codes.to_numpy()]          # code -1 (no label) -> the last entry
    return pd.Categorical(lab.astype(str).to_numpy(),
                          categories=list(strata)).codes.astype(np.int64)


def group_means(full: pd.DataFrame, *, strata, n_bins: int = MEAN_BINS,
                min_visits: int = MEAN_MIN_VISITS) -> pd.DataFrame:
    """Binned mean response over time per group, from every subject of the group.

    Time is cut into ``n_bins`` equal-width bins over the whole cohort's range
    (shared by all groups, so group curves are comparable); a bin's point sits at
    the mean visit time inside it. Bins with fewer than ``min_visits`` visits are dropped.

    Returns
    -------
    DataFrame
        stratum_label, bin, time, response, visits.
    """
    t = full["time"].to_numpy(float)
    y = full["response"].to_numpy(float)
    cols = ["stratum_label", "bin", "time", "response", "visits"]
    ok = np.isfinite(t) & np.isfinite(y)
    if not ok.any():
        return pd.DataFrame(columns=cols)
    codes = label_positions(full, strata)[ok]
    t, y = t[ok], y[ok]
    edges, b = equal_width_bins(t, n_bins)
    nb = edges.size - 1
    keep = codes >= 0
    key = codes[keep] * nb + b[keep]
    size = len(strata) * nb
    return means_table(strata, nb, np.bincount(key, minlength=size),
                       np.bincount(key, weights=t[keep], minlength=size),
                       np.bincount(key, weights=y[keep], minlength=size), min_visits=min_visits)


def means_table(strata, n_bins: int, n, sum_t, sum_y, *,
                min_visits: int = MEAN_MIN_VISITS) -> pd.DataFrame:
    """:func:`group_means`'s table from its sums per (group, time bin) cell, laid out group by
    group (``cell = group * n_bins + bin``): visits ``n``, sums of time and of response."""
    cell = np.flatnonzero(n >= max(int(min_visits), 1))
    return pd.DataFrame({
        "stratum_label": np.asarray(strata, dtype=object)[cell // n_bins],
        "bin": cell % n_bins,
        "time": sum_t[cell] / n[cell],
        "response": sum_y[cell] / n[cell],
        "visits": n[cell],
    }, columns=["stratum_label", "bin", "time", "response", "visits"])


def visit_counts(lines: pd.DataFrame, *, strata) -> pd.DataFrame:
    """Subjects per (number of visits, group): index visits, one column per group."""
    tab = pd.crosstab(lines["n"].astype(int), lines["stratum_label"].astype(str))
    cols = [s for s in strata if s in tab.columns] + sorted(set(tab.columns) - set(strata))
    full = np.arange(tab.index.min(), tab.index.max() + 1) if len(tab) else []
    return tab.reindex(index=full, columns=cols, fill_value=0)


def mean_interval_halfwidth(sd, n, level: float = CONFIDENCE_LEVEL) -> np.ndarray:
    """Half-width of the normal ``level`` interval of a mean: ``z * sd / sqrt(n)`` (NaN-safe).

    Used for the response at the last visit per group and follow-up status
    (:attr:`Dropout.by_stratum` columns ``sd`` and ``n``).
    """
    sd = np.asarray(sd, dtype=float)
    n = np.asarray(n, dtype=float)
    return z_quantile(level) * sd / np.sqrt(n)
