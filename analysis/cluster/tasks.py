"""What a worker does with one partition: pure functions of one partition's rows.

Each function takes a :class:`Part` (one prepared partition, kept on a worker) and small
arguments from the client, and returns small partial sums. Nothing here imports dask: the
functions are plain Python and run the same in a test without a cluster.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from analysis.errors import CohortError, DataError, clip
from analysis.exploration.lagcorr import lag_cross_sums, lag_window_sums
from analysis.exploration.pairs import n_within_pairs
from analysis.preparation.panel import Panel
from analysis.preparation.prepare import CohortSelection, _Tracker, select_cohort
from analysis.settings import Roles, Settings
from analysis.splines import natural_spline_basis
from analysis.exploration.subject_fits import fit_subject_lines
from analysis.exploration.summaries import profile_sums
from analysis.exploration.variogram import process_variance_sum, variogram_sums

#: buckets of the histogram pass of an exact order statistic
MEDIAN_BUCKETS = 4096


class PartitionEmptied(Exception):
    """Every visit of a partition was removed by an inclusion step (not an error: the other
    partitions may still hold visits). Carries the steps counted so far."""

    def __init__(self, steps):
        super().__init__("partition emptied")
        self.steps = steps


class _PartTracker(_Tracker):
    """The inclusion-step counter of one partition: running empty stops this partition only."""

    def record(self, name, subjects):
        try:
            super().record(name, subjects)
        except DataError:
            raise PartitionEmptied(list(self._steps)) from None


@dataclass(frozen=True, eq=False)
class Part:
    """One prepared partition: its file, the inclusion steps counted on it and the selection
    (None when the inclusion rules removed every visit)."""

    name: str
    steps: tuple
    selection: CohortSelection | None

    @property
    def panel(self) -> Panel | None:
        return None if self.selection is None else self.selection.panel


def load_part(path: str, roles: Roles, settings: Settings) -> Part:
    """Read one partition and apply the validation and inclusion rules to it."""
    from analysis.cluster.partitions import read_partition

    frame = read_partition(path)
    if len(frame) == 0:
        return Part(path, (("All rows read", 0, 0),), None)
    try:
        sel = select_cohort(frame, roles, settings, tracker=_PartTracker)
    except PartitionEmptied as done:
        return Part(path, tuple((s.step, s.subjects, s.observations) for s in done.steps), None)
    except CohortError as exc:
        # rows are counted within the partition file: say which file
        exc.args = (f"partition {clip(path)}: {exc}",)
        raise
    steps = tuple((s.step, s.subjects, s.observations) for s in sel.attrition.steps)
    return Part(path, steps, sel)


# --------------------------------------------------------------------------- overview
def overview(part: Part) -> dict:
    """Per-subject tables and the partition's ranges (everything the client needs once)."""
    out = {"name": part.name, "steps": part.steps, "empty": part.selection is None}
    if part.selection is None:
        return out
    sel = part.selection
    p = sel.panel
    last = p.starts + p.counts - 1
    same = np.diff(p.codes) == 0
    gaps = np.diff(p.time)[same]
    fu = sel.followup
    out.update(
        labels=sel.subject_ids, baseline=sel.baseline, kinds=sel.covariate_kinds,
        covariate=sel.covariate, warnings=sel.warnings, time_label=sel.time_label,
        followup=None if fu is None else {
            "kind": fu.kind, "origin": fu.origin, "end": fu.end, "latest": fu.latest,
            "unit_days": fu.unit_days, "end_column": fu.end_column},
        lines=fit_subject_lines(p).to_frame(sel.subject_ids),
        counts=p.counts, last_time=p.time[last], last_y=p.y[last],
        tmin=float(p.time.min()), tmax=float(p.time.max()),
        longest=float(np.max(np.abs(p.time[last] - p.time[p.starts]))),
        pairs=n_within_pairs(p.counts),
        gap_n=int(gaps.size), gap_min=float(gaps.min()) if gaps.size else np.nan,
        gap_max=float(gaps.max()) if gaps.size else np.nan,
    )
    return out


# --------------------------------------------------------------------------- mean trend
def _row_groups(part: Part, subject_groups) -> np.ndarray | None:
    return None if subject_groups is None else np.asarray(subject_groups)[part.panel.codes]


def trend_tallies(part: Part, subject_groups) -> dict:
    """Per fit (-1 = pooled, g = group g): distinct times, visits and response sum."""
    if part.selection is None:
        return {}
    p = part.panel
    rows = _row_groups(part, subject_groups)
    keys = [-1] + ([] if rows is None else [int(g) for g in np.unique(rows[rows >= 0])])
    out = {}
    for key in keys:
        sel = slice(None) if key == -1 else rows == key
        t, y = p.time[sel], p.y[sel]
        out[key] = (np.unique(t), int(t.size), float(y.sum()))
    return out


def trend_factors(part: Part, subject_groups, knots_of: dict) -> dict:
    """Per fit with a spline or line: (R, Qᵀy) of the partition's rows (tall-skinny QR: the
    factors of all partitions, stacked and factorised again, give the least-squares fit)."""
    if part.selection is None:
        return {}
    p = part.panel
    rows = _row_groups(part, subject_groups)
    out = {}
    for key, knots in knots_of.items():
        sel = slice(None) if key == -1 else rows == key
        t, y = p.time[sel], p.y[sel]
        if t.size == 0:
            continue
        q, r = np.linalg.qr(natural_spline_basis(t, knots, intercept=True))
        out[key] = (r, q.T @ y)
    return out


@dataclass(frozen=True)
class TrendFit:
    """The mean trend of one fit: a constant (``mean``) or spline coefficients at ``knots``."""

    mean: float | None = None
    knots: np.ndarray | None = None
    beta: np.ndarray | None = None

    def at(self, t: np.ndarray) -> np.ndarray:
        if self.knots is None:
            return np.full(t.shape, self.mean)
        return natural_spline_basis(t, self.knots, intercept=True) @ self.beta


def residual_panel(part: Part, fits: dict, subject_groups) -> Panel:
    """The partition's panel with the response replaced by the residual from the mean trend
    (rows of a group with its own fit use it; the others the pooled fit)."""
    p = part.panel
    fitted = fits[-1].at(p.time)
    rows = _row_groups(part, subject_groups)
    if rows is not None:
        fitted = fitted.copy()
        for key, fit in fits.items():
            if key != -1:
                sel = rows == key
                fitted[sel] = fit.at(p.time[sel])
    return p.with_y(p.y - fitted)


# --------------------------------------------------------------------------- residual passes
def first_pass(part: Part, fits, subject_groups, *, lag: tuple, profiles: tuple,
               gap_range: tuple | None) -> dict:
    """Residual sum and count, lag-window sums, profile sums and the gap histogram."""
    if part.selection is None:
        return {}
    r = residual_panel(part, fits, subject_groups)
    start, width, n_win = lag
    subjects, col_sum = lag_window_sums(r, start=start, width=width, n_win=n_win)
    cohort_codes, edges, k = profiles
    prof = profile_sums(part.panel, np.asarray(cohort_codes), edges, k)
    out = {"r_sum": float(r.y.sum()), "n": r.n_obs, "win_subjects": subjects,
           "win_sum": col_sum, "profiles": prof}
    if gap_range is not None:
        out["gap_hist"] = np.bincount(_gap_bucket(part, gap_range), minlength=MEDIAN_BUCKETS)
    return out


def _gaps(part: Part) -> np.ndarray:
    p = part.panel
    return np.diff(p.time)[np.diff(p.codes) == 0]


def _gap_bucket(part: Part, gap_range) -> np.ndarray:
    lo, hi = gap_range
    g = _gaps(part)
    if hi <= lo:
        return np.zeros(g.size, dtype=np.int64)
    b = np.floor((g - lo) / (hi - lo) * MEDIAN_BUCKETS).astype(np.int64)
    return np.clip(b, 0, MEDIAN_BUCKETS - 1)


def second_pass(part: Part, fits, subject_groups, *, variogram: dict, lag: tuple,
                col_mean: np.ndarray, centre: float, big_n: float, gap_range, gap_buckets
                ) -> dict:
    """Semivariogram bin sums (and the picked pairs), the process-variance sum, the lag cross
    products and the gaps inside the buckets holding the median."""
    if part.selection is None:
        return {}
    r = residual_panel(part, fits, subject_groups)
    start, width, n_win = lag
    out = {
        "variogram": variogram_sums(r, n_bins=variogram["n_bins"], max_lag=variogram["max_lag"],
                                    pick=variogram["pick"]),
        "pv_sum": process_variance_sum(r, centre, big_n),
        "cross": lag_cross_sums(r, start=start, width=width, n_win=n_win, col_mean=col_mean),
    }
    if gap_range is not None:
        inside = np.isin(_gap_bucket(part, gap_range), gap_buckets)
        out["gap_values"] = np.unique(_gaps(part)[inside], return_counts=True)
    return out


def part_rows(part: Part, labels) -> pd.DataFrame:
    """The analysed visits of some subjects of this partition (for a subject card)."""
    if part.selection is None:
        return pd.DataFrame({"subject": [], "time": [], "response": []})
    sel = part.selection
    keep = np.isin(sel.subject_ids, np.asarray(labels, dtype=object))
    rows = keep[sel.panel.codes]
    return pd.DataFrame({"subject": sel.subject_ids[sel.panel.codes[rows]],
                         "time": sel.panel.time[rows], "response": sel.panel.y[rows]})
