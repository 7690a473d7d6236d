"""Summaries that keep a view's size fixed whatever the cohort's size.

Above :data:`SUMMARY_SUBJECTS` subjects the per-subject views draw these instead of one mark per
subject, and say so:

* :func:`percentile_bands` - per group, every ``step``-th percentile of the subject slopes and of
  their interval ends (sorted slopes as bands);
* :func:`subject_sample` - a seeded random sample of subjects per group drawn individually on top,
  a highlighted subject always among them;
* :func:`density_grid` - counts of (covariate, slope) pairs on a grid, with
  :func:`cell_members` naming the subjects of one cell;
* :func:`box_statistics` - quartiles, whisker ends and outlier counts per group;
* :func:`band_members` - the subjects of one percentile band of one group (first N), for linking;
* :func:`thin_steps` - a step curve (e.g. Kaplan-Meier) read on a time grid.

Every function works on whole arrays (group-sorted with one ``lexsort``), never per subject.
Percentiles and quartiles use linear interpolation between order statistics, the default of
``numpy.percentile`` and ``pandas.Series.quantile``.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from analysis.exploration.lagbins import edge_bin, equal_width_edges

#: above this many subjects the subject lines, slopes by group and slope-against-covariate
#: views draw summaries (bands, box statistics, a density grid) plus a sample of subjects
SUMMARY_SUBJECTS = 2000
#: subjects drawn individually over the summaries, per group (the highlighted one is added)
SAMPLE_PER_GROUP = 60
#: percent between neighbouring percentile bands
BAND_STEP = 0.5
#: cells of the density grid (covariate x slope)
GRID_SHAPE = (60, 40)
#: subjects listed when a band or a cell is clicked
MEMBERS_SHOWN = 20
#: Tukey's whisker rule: whiskers reach the most extreme value within 1.5 IQR of the box
#: (common practice)
WHISKER_IQR = 1.5


# --------------------------------------------------------------------------- grouping
def _group_sorted(values: np.ndarray, groups: np.ndarray):
    """(order, sorted groups, present groups, starts, counts) of the finite values, sorted by
    group then value; ``order`` indexes the original arrays."""
    values = np.asarray(values, dtype=float)
    groups = np.asarray(groups)
    keep = np.flatnonzero(np.isfinite(values))
    order = keep[np.lexsort((values[keep], groups[keep]))]
    g = groups[order]
    present, starts, counts = np.unique(g, return_index=True, return_counts=True)
    return order, g, present, starts, counts


def _interpolated(sorted_values: np.ndarray, starts: np.ndarray, counts: np.ndarray,
                  percent: np.ndarray) -> np.ndarray:
    """(n_groups, n_percent) linear-interpolation percentiles of each group's sorted block."""
    if starts.size == 0:
        return np.empty((0, percent.size))
    h = (counts[:, None] - 1) * (percent[None, :] / 100.0)
    lo = np.floor(h).astype(np.int64)
    hi = np.minimum(lo + 1, counts[:, None] - 1)
    frac = h - lo
    a = sorted_values[starts[:, None] + lo]
    b = sorted_values[starts[:, None] + hi]
    return a + frac * (b - a)


def group_percentiles(values, groups, percent) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(present groups, subjects with a finite value per group, percentiles (groups x percent)).

    Non-finite values are left out; a group with none does not appear.
    """
    percent = np.asarray(percent, dtype=float)
    values = np.asarray(values, dtype=float)
    order, _, present, starts, counts = _group_sorted(values, groups)
    return present, counts, _interpolated(values[order], starts, counts, percent)


# --------------------------------------------------------------------------- bands
@dataclass(frozen=True, eq=False)
class PercentileBands:
    """Per group, percentiles of the subject slopes and of their interval ends.

    Attributes
    ----------
    groups : ndarray (g,)
        Group codes with at least one slope (ascending).
    percent : ndarray (k,)
        0, step, 2 step, ..., 100.
    slope, lo, hi : ndarray (g, k)
        Percentiles of the slopes, of the lower and of the upper interval ends (the ends of the
        subjects that have an interval; NaN for a group with none).
    n, n_interval : ndarray (g,)
        Subjects with a slope, and with an interval, per group.
    """

    groups: np.ndarray
    percent: np.ndarray
    slope: np.ndarray
    lo: np.ndarray
    hi: np.ndarray
    n: np.ndarray
    n_interval: np.ndarray

    def to_frame(self) -> pd.DataFrame:
        g, k = self.slope.shape
        return pd.DataFrame({
            "group": np.repeat(self.groups, k), "percent": np.tile(self.percent, g),
            "slope": self.slope.ravel(), "lo": self.lo.ravel(), "hi": self.hi.ravel(),
            "n": np.repeat(self.n, k), "n_interval": np.repeat(self.n_interval, k)})


def percentile_bands(slope, lo, hi, groups, *, step: float = BAND_STEP) -> PercentileBands:
    """Every ``step``-th percentile of ``slope`` and of the interval ends ``lo``/``hi`` per group.

    ``lo``/``hi`` are NaN for subjects without an interval (they count only in ``slope``).
    """
    if not 0 < step <= 100:
        raise ValueError(f"step == {step}, must be in (0, 100]")
    percent = np.unique(np.r_[np.arange(0.0, 100.0, step), 100.0])
    slope = np.asarray(slope, dtype=float)
    groups = np.asarray(groups)
    present, n, s = group_percentiles(slope, groups, percent)
    out_lo = np.full_like(s, np.nan)
    out_hi = np.full_like(s, np.nan)
    n_int = np.zeros(present.size, dtype=np.int64)
    for ends, out in ((lo, out_lo), (hi, out_hi)):
        ends = np.where(np.isfinite(slope), np.asarray(ends, dtype=float), np.nan)
        gp, cnt, q = group_percentiles(ends, groups, percent)
        rows = np.searchsorted(present, gp)
        out[rows] = q
        n_int[rows] = cnt
    return PercentileBands(present, percent, s, out_lo, out_hi, n, n_int)


def percent_rank(values, groups) -> np.ndarray:
    """Each value's position within its group's sorted values as a percent: 0 for the smallest,
    100 for the largest (the abscissa of :func:`percentile_bands`); NaN for a non-finite value."""
    values = np.asarray(values, dtype=float)
    order, _, _, starts, counts = _group_sorted(values, groups)
    pos = np.arange(order.size) - np.repeat(starts, counts)
    denom = np.repeat(np.maximum(counts - 1, 1), counts)
    out = np.full(values.size, np.nan)
    out[order] = np.where(np.repeat(counts, counts) > 1, 100.0 * pos / denom, 50.0)
    return out


@dataclass(frozen=True)
class Members:
    """Subjects of one band or cell: the first ``limit`` (indices into the input arrays, in
    ascending order of the value) and how many there are in all."""

    index: np.ndarray
    total: int


def band_members(values, groups, group, lo_percent: float, hi_percent: float, *,
                 limit: int = MEMBERS_SHOWN) -> Members:
    """Subjects of ``group`` whose percent rank (:func:`percent_rank`) lies in
    ``[lo_percent, hi_percent]``, in ascending order of value."""
    values = np.asarray(values, dtype=float)
    groups = np.asarray(groups)
    rank = percent_rank(values, groups)
    inside = np.flatnonzero((groups == group) & (rank >= lo_percent) & (rank <= hi_percent))
    inside = inside[np.argsort(values[inside], kind="stable")]
    return Members(inside[:limit], int(inside.size))


# --------------------------------------------------------------------------- sample
def subject_sample(groups, *, per_group: int = SAMPLE_PER_GROUP, seed: int = 1,
                   keep: int | None = None, eligible=None) -> np.ndarray:
    """Indices of a seeded random sample: up to ``per_group`` subjects of each group, drawn
    without replacement (each subject gets a uniform random key; the smallest keys of a group
    are taken), plus ``keep`` (e.g. the highlighted subject) when given. ``eligible`` (bool
    per subject) limits the draw. Ascending order; the same (groups, seed) gives the same draw."""
    groups = np.asarray(groups)
    n = groups.size
    rng = np.random.default_rng(seed)
    key = rng.random(n)
    ok = np.ones(n, dtype=bool) if eligible is None else np.asarray(eligible, dtype=bool)
    idx = np.flatnonzero(ok)
    idx = idx[np.lexsort((key[idx], groups[idx]))]
    g = groups[idx]
    if idx.size:
        _, starts, counts = np.unique(g, return_index=True, return_counts=True)
        within = np.arange(idx.size) - np.repeat(starts, counts)
        idx = idx[within < per_group]
    if keep is not None and 0 <= keep < n:
        idx = np.union1d(idx, [keep])
    return np.sort(idx)


# --------------------------------------------------------------------------- density grid
@dataclass(frozen=True, eq=False)
class DensityGrid:
    """Counts of (x, y) pairs on a grid of equal-width cells.

    Attributes
    ----------
    x_edges, y_edges : ndarray
        Cell edges; with ``log_x`` the x edges are log10 of the values.
    counts : ndarray (nx, ny)
        Pairs per cell; a value on an inner edge counts in the cell above it, one on the last
        edge in the last cell (as ``numpy.histogram2d``).
    n_inside, n_outside : int
        Finite pairs inside the grid's ranges and outside them (not counted in a cell).
    log_x : bool
    """

    x_edges: np.ndarray
    y_edges: np.ndarray
    counts: np.ndarray
    n_inside: int
    n_outside: int
    log_x: bool = False

    def scaled_x(self, x) -> np.ndarray:
        x = np.asarray(x, dtype=float)
        if not self.log_x:
            return x
        with np.errstate(divide="ignore", invalid="ignore"):
            return np.where(x > 0, np.log10(np.where(x > 0, x, 1.0)), np.nan)

    def inside(self, x, y) -> np.ndarray:
        xs, y = self.scaled_x(x), np.asarray(y, dtype=float)
        return ((xs >= self.x_edges[0]) & (xs <= self.x_edges[-1])
                & (y >= self.y_edges[0]) & (y <= self.y_edges[-1]))

    def cells(self, x, y) -> tuple[np.ndarray, np.ndarray]:
        """(column i, row j) of each pair's cell (-1 where outside the grid)."""
        ok = self.inside(x, y)
        i = np.where(ok, edge_bin(np.nan_to_num(self.scaled_x(x)), self.x_edges), -1)
        j = np.where(ok, edge_bin(np.nan_to_num(np.asarray(y, dtype=float)), self.y_edges), -1)
        return i, j

    @property
    def x_centres(self) -> np.ndarray:
        c = 0.5 * (self.x_edges[:-1] + self.x_edges[1:])
        return 10.0 ** c if self.log_x else c

    @property
    def y_centres(self) -> np.ndarray:
        return 0.5 * (self.y_edges[:-1] + self.y_edges[1:])

    def to_frame(self) -> pd.DataFrame:
        nx, ny = self.counts.shape
        return pd.DataFrame({"i": np.repeat(np.arange(nx), ny), "j": np.tile(np.arange(ny), nx),
                             "x": np.repeat(self.x_centres, ny), "y": np.tile(self.y_centres, nx),
                             "count": self.counts.ravel()})


def density_grid(x, y, *, shape: tuple[int, int] = GRID_SHAPE, x_range=None, y_range=None,
                 log_x: bool = False) -> DensityGrid:
    """Counts of the finite (x, y) pairs on ``shape`` equal-width cells.

    ``x_range``/``y_range`` default to the range of the finite values (on the log10 scale
    with ``log_x``, where only positive x count).
    """
    nx, ny = int(shape[0]), int(shape[1])
    if nx < 1 or ny < 1:
        raise ValueError(f"shape == {shape}, needs at least one cell each way")
    x = np.asarray(x, dtype=float)
    y = np.asarray(y, dtype=float)
    probe = DensityGrid(np.array([-np.inf, np.inf]), np.array([-np.inf, np.inf]),
                        np.zeros((1, 1)), 0, 0, log_x)
    xs = probe.scaled_x(x)
    finite = np.isfinite(xs) & np.isfinite(y)
    if not finite.any():
        raise ValueError("no finite (x, y) pairs to count")
    xr = x_range if x_range is not None else (float(xs[finite].min()), float(xs[finite].max()))
    yr = y_range if y_range is not None else (float(y[finite].min()), float(y[finite].max()))
    x_edges = equal_width_edges(float(xr[0]), float(xr[1]), nx)
    y_edges = equal_width_edges(float(yr[0]), float(yr[1]), ny)
    nx, ny = x_edges.size - 1, y_edges.size - 1
    grid = DensityGrid(x_edges, y_edges, np.zeros((nx, ny), dtype=np.int64), 0, 0, log_x)
    i, j = grid.cells(x, y)
    ok = i >= 0
    counts = np.bincount(i[ok] * ny + j[ok], minlength=nx * ny).reshape(nx, ny)
    n_in = int(ok.sum())
    return DensityGrid(x_edges, y_edges, counts, n_in, int(finite.sum()) - n_in, log_x)


def cell_members(grid: DensityGrid, x, y, i: int, j: int, *, order=None,
                 limit: int = MEMBERS_SHOWN) -> Members:
    """Subjects whose (x, y) lies in cell (i, j), in ascending order of ``order`` (default y)."""
    ci, cj = grid.cells(x, y)
    inside = np.flatnonzero((ci == i) & (cj == j))
    key = np.asarray(y if order is None else order, dtype=float)[inside]
    inside = inside[np.argsort(key, kind="stable")]
    return Members(inside[:limit], int(inside.size))


# --------------------------------------------------------------------------- box statistics
@dataclass(frozen=True, eq=False)
class BoxStatistics:
    """Per group: count, mean, quartiles, whisker ends and outliers beyond them.

    Whiskers reach the most extreme values within :data:`WHISKER_IQR` interquartile ranges of
    the box (common practice); ``n_below``/``n_above`` count the values beyond them.
    """

    groups: np.ndarray
    n: np.ndarray
    mean: np.ndarray
    q1: np.ndarray
    median: np.ndarray
    q3: np.ndarray
    lower: np.ndarray
    upper: np.ndarray
    n_below: np.ndarray
    n_above: np.ndarray

    def to_frame(self) -> pd.DataFrame:
        return pd.DataFrame({k: getattr(self, k) for k in (
            "groups", "n", "mean", "q1", "median", "q3", "lower", "upper", "n_below",
            "n_above")}).rename(columns={"groups": "group"})


def box_statistics(values, groups) -> BoxStatistics:
    """Box-plot statistics of the finite ``values`` of each group (quartiles by linear
    interpolation, as ``pandas.Series.quantile``)."""
    values = np.asarray(values, dtype=float)
    order, _, present, starts, counts = _group_sorted(values, groups)
    v = values[order]
    q = _interpolated(v, starts, counts, np.array([25.0, 50.0, 75.0]))
    q1, med, q3 = q[:, 0], q[:, 1], q[:, 2]
    iqr = q3 - q1
    lo_lim = np.repeat(q1 - WHISKER_IQR * iqr, counts)
    hi_lim = np.repeat(q3 + WHISKER_IQR * iqr, counts)
    below = v < lo_lim
    above = v > hi_lim
    n_below = np.add.reduceat(below.astype(np.int64), starts) if starts.size else counts * 0
    n_above = np.add.reduceat(above.astype(np.int64), starts) if starts.size else counts * 0
    # sorted blocks: the lower whisker is the first value not below, the upper the last not above
    ends = starts + counts - 1
    lower = v[starts + n_below] if starts.size else q1
    upper = v[ends - n_above] if starts.size else q3
    mean = np.add.reduceat(v, starts) / counts if starts.size else q1
    return BoxStatistics(present, counts, mean, q1, med, q3, lower, upper, n_below, n_above)


# --------------------------------------------------------------------------- step curves
def thin_steps(time, groups, *, n_points: int = 400) -> np.ndarray:
    """Rows of a step curve (sorted by group, then time) to keep so that each group has at most
    about ``n_points`` steps: on a grid of ``n_points`` equally spaced times over the group's
    range, the last row at or before each grid time, plus each group's first and last row.
    A step curve drawn through the kept rows ("hv" shape) equals the full one at every grid
    time. Returns sorted row indices."""
    time = np.asarray(time, dtype=float)
    groups = np.asarray(groups)
    if time.size == 0:
        return np.zeros(0, dtype=np.int64)
    _, starts, counts = np.unique(groups, return_index=True, return_counts=True)
    order = np.argsort(starts)
    starts, counts = starts[order], counts[order]
    keep = [starts, starts + counts - 1]
    small = counts <= n_points
    keep.append(np.concatenate([np.arange(s, s + c) for s, c in zip(starts[small],
                                                                    counts[small])] or [[]]
                               ).astype(np.int64))
    for s, c in zip(starts[~small], counts[~small]):   # one pass per group (few groups)
        t = time[s:s + c]
        grid = np.linspace(t[0], t[-1], n_points)
        keep.append(s + np.searchsorted(t, grid, side="right") - 1)
    return np.unique(np.concatenate(keep).astype(np.int64))
