"""Summaries for large cohorts (analysis/digest.py) against full-data references:
numpy.percentile, numpy.histogram2d, pandas quantiles, and brute-force counts in the test."""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from analysis.exploration.digest import (WHISKER_IQR, band_members, box_statistics, cell_members,
                             density_grid, group_percentiles, percent_rank, percentile_bands,
                             subject_sample, thin_steps)


@pytest.fixture()
def cohort():
    rng = np.random.default_rng(11)
    n = 5000
    groups = rng.integers(-1, 4, n)               # -1 = "no value", as strata codes
    slope = rng.normal(-0.1, 0.3, n) + 0.05 * groups
    slope[rng.random(n) < 0.02] = np.nan          # subjects without a slope
    half = np.abs(rng.normal(0.2, 0.05, n))
    lo, hi = slope - half, slope + half
    no_int = rng.random(n) < 0.1                  # two visits: slope, no interval
    lo[no_int] = hi[no_int] = np.nan
    x = np.exp(rng.normal(3.0, 0.9, n))
    x[rng.random(n) < 0.03] = np.nan
    return dict(groups=groups, slope=slope, lo=lo, hi=hi, x=x)


def test_percentile_bands_equal_numpy_percentile(cohort):
    b = percentile_bands(cohort["slope"], cohort["lo"], cohort["hi"], cohort["groups"], step=0.5)
    assert b.percent[0] == 0 and b.percent[-1] == 100 and b.percent.size == 201
    assert list(b.groups) == [-1, 0, 1, 2, 3]
    for r, g in enumerate(b.groups):
        mine = cohort["groups"] == g
        s = cohort["slope"][mine]
        s = s[np.isfinite(s)]
        # reference: numpy.percentile (default linear interpolation) on the group's slopes
        np.testing.assert_allclose(b.slope[r], np.percentile(s, b.percent), rtol=1e-12)
        assert b.n[r] == s.size
        lo = cohort["lo"][mine]
        lo = lo[np.isfinite(lo)]
        # reference: numpy.percentile of the interval ends of the subjects that have one
        np.testing.assert_allclose(b.lo[r], np.percentile(lo, b.percent), rtol=1e-12)
        hi = cohort["hi"][mine]
        np.testing.assert_allclose(b.hi[r], np.percentile(hi[np.isfinite(hi)], b.percent),
                                   rtol=1e-12)
        assert b.n_interval[r] == lo.size
    frame = b.to_frame()
    assert len(frame) == b.groups.size * b.percent.size


def test_group_percentiles_single_value_group():
    present, n, q = group_percentiles([5.0, 1.0, 2.0], [7, 3, 3], [0, 50, 100])
    # reference: numpy.percentile on each group by hand
    np.testing.assert_allclose(q[0], np.percentile([1.0, 2.0], [0, 50, 100]))
    np.testing.assert_allclose(q[1], np.percentile([5.0], [0, 50, 100]))
    assert list(present) == [3, 7] and list(n) == [2, 1]


def test_band_members_lie_between_the_band_percentiles(cohort):
    slope, groups = cohort["slope"], cohort["groups"]
    m = band_members(slope, groups, 2, 10.0, 12.5, limit=5)
    s = slope[(groups == 2) & np.isfinite(slope)]
    # reference: numpy.percentile bounds of the band; brute-force count of the values inside
    lo, hi = np.percentile(s, [10.0, 12.5])
    assert m.total == int(((s >= lo) & (s <= hi)).sum())
    assert m.index.size == min(5, m.total)
    assert np.all(groups[m.index] == 2)
    assert np.all((slope[m.index] >= lo) & (slope[m.index] <= hi))
    assert np.all(np.diff(slope[m.index]) >= 0)


def test_percent_rank_is_position_in_sorted_group():
    v = np.array([3.0, 1.0, 2.0, np.nan, 10.0, 4.0])
    g = np.array([0, 0, 0, 0, 1, 5])
    r = percent_rank(v, g)
    # reference: brute force, rank / (n - 1) within each group; a lone subject sits at 50
    assert r[1] == 0 and r[2] == 50 and r[0] == 100
    assert np.isnan(r[3]) and r[4] == 50 and r[5] == 50


def test_subject_sample_per_group_keep_and_seed(cohort):
    groups = cohort["groups"]
    keep = int(np.flatnonzero(groups == 3)[-1])
    a = subject_sample(groups, per_group=25, seed=3, keep=keep)
    # reference: pandas value_counts of the sample against the group sizes
    counts = pd.Series(groups[a]).value_counts()
    sizes = pd.Series(groups).value_counts()
    for g, size in sizes.items():
        want = min(25, size) + (1 if g == 3 and keep not in
                                subject_sample(groups, per_group=25, seed=3) else 0)
        assert counts[g] == want
    assert keep in a and len(set(a)) == a.size
    assert np.array_equal(a, subject_sample(groups, per_group=25, seed=3, keep=keep))
    assert not np.array_equal(a, subject_sample(groups, per_group=25, seed=4, keep=keep))
    ok = np.isfinite(cohort["slope"])
    b = subject_sample(groups, per_group=25, seed=3, eligible=ok)
    assert ok[b].all()


def test_density_grid_equals_numpy_histogram2d(cohort):
    x, y = cohort["x"], cohort["slope"]
    yr = (float(np.nanpercentile(y, 1)), float(np.nanpercentile(y, 99)))
    grid = density_grid(x, y, shape=(30, 20), y_range=yr)
    fin = np.isfinite(x) & np.isfinite(y)
    # reference: numpy.histogram2d with the same edges (x range = finite range)
    ref, _, _ = np.histogram2d(x[fin], y[fin], bins=[grid.x_edges, grid.y_edges])
    np.testing.assert_array_equal(grid.counts, ref)
    inside = fin & (y >= yr[0]) & (y <= yr[1])
    assert grid.n_inside == int(inside.sum()) and grid.n_outside == int((fin & ~inside).sum())


def test_density_grid_log_axis_equals_histogram2d_of_log10(cohort):
    x, y = cohort["x"], cohort["slope"]
    grid = density_grid(x, y, shape=(25, 15), log_x=True)
    fin = np.isfinite(x) & np.isfinite(y) & (x > 0)
    # reference: numpy.histogram2d on log10(x) (same edges)
    ref, _, _ = np.histogram2d(np.log10(x[fin]), y[fin], bins=[grid.x_edges, grid.y_edges])
    np.testing.assert_array_equal(grid.counts, ref)
    assert grid.counts.sum() == fin.sum()
    np.testing.assert_allclose(np.log10(grid.x_centres),
                               0.5 * (grid.x_edges[1:] + grid.x_edges[:-1]))


def test_cell_members_are_the_cell_of_histogram2d(cohort):
    x, y = cohort["x"], cohort["slope"]
    grid = density_grid(x, y, shape=(12, 8))
    i, j = np.unravel_index(np.argmax(grid.counts), grid.counts.shape)
    m = cell_members(grid, x, y, int(i), int(j), limit=7)
    # reference: the histogram2d count of that cell, and each member inside its edges
    assert m.total == grid.counts[i, j]
    assert m.index.size == 7
    assert np.all((x[m.index] >= grid.x_edges[i]) & (x[m.index] <= grid.x_edges[i + 1]))
    assert np.all((y[m.index] >= grid.y_edges[j]) & (y[m.index] <= grid.y_edges[j + 1]))


def test_box_statistics_equal_pandas_quantiles(cohort):
    v, g = cohort["slope"], cohort["groups"]
    box = box_statistics(v, g)
    frame = pd.DataFrame({"v": v, "g": g}).dropna()
    grp = frame.groupby("g")["v"]
    # reference: pandas quantile (linear interpolation), mean and count per group
    np.testing.assert_allclose(box.q1, grp.quantile(0.25).to_numpy(), rtol=1e-12)
    np.testing.assert_allclose(box.median, grp.quantile(0.5).to_numpy(), rtol=1e-12)
    np.testing.assert_allclose(box.q3, grp.quantile(0.75).to_numpy(), rtol=1e-12)
    np.testing.assert_allclose(box.mean, grp.mean().to_numpy(), rtol=1e-12)
    np.testing.assert_array_equal(box.n, grp.size().to_numpy())
    # reference: brute force whiskers (Tukey's 1.5 IQR rule, common practice) per group
    for r, (key, s) in enumerate(grp):
        q1, q3 = s.quantile(0.25), s.quantile(0.75)
        lo_lim, hi_lim = q1 - WHISKER_IQR * (q3 - q1), q3 + WHISKER_IQR * (q3 - q1)
        assert box.lower[r] == s[s >= lo_lim].min() and box.upper[r] == s[s <= hi_lim].max()
        assert box.n_below[r] == (s < lo_lim).sum() and box.n_above[r] == (s > hi_lim).sum()


def test_thin_steps_keep_the_curve_at_every_grid_time():
    rng = np.random.default_rng(5)
    parts = []
    for g, n in (("A", 3000), ("B", 50), ("C", 1200)):
        t = np.sort(rng.uniform(0, 60, n))
        parts.append(pd.DataFrame({"label": g, "time": t,
                                   "retained": np.cumprod(1 - rng.uniform(0, 0.001, n))}))
    frame = pd.concat(parts, ignore_index=True)
    keep = thin_steps(frame["time"], frame["label"], n_points=200)
    kept = frame.iloc[keep]
    assert len(kept[kept["label"] == "B"]) == 50          # short curves are kept whole
    assert len(kept) < 200 * 2 + 50 + 10
    for g, full in frame.groupby("label"):
        small = kept[kept["label"] == g]
        grid = pd.DataFrame({"time": np.linspace(full["time"].iloc[0], full["time"].iloc[-1],
                                                 200)})
        # reference: pandas merge_asof reads each step curve at the grid times
        a = pd.merge_asof(grid, full[["time", "retained"]], on="time")["retained"]
        b = pd.merge_asof(grid, small[["time", "retained"]], on="time")["retained"]
        np.testing.assert_array_equal(a.to_numpy(), b.to_numpy())
