"""Comparison table and likelihood-ratio tests against scipy.stats.chi2 computed here."""
from types import SimpleNamespace

import numpy as np
import pytest
from scipy import stats

from analysis.models.compare import NESTED, comparison_table, likelihood_ratio, mixture_sf, nested_pairs
from analysis.errors import ModelError
from analysis.models.mixed import STRUCTURES, fit_mixed
from analysis.preparation.panel import Panel

_NPAR = {"independence": 1, "intercept": 2, "intercept+slope": 4, "serial": 3,
         "intercept+serial": 4, "intercept+slope+serial": 6}


def _fake(structure, loglik, *, names=("intercept", "time"), method="reml", m=50, n=300,
          correlation="exponential", converged=True):
    k = len(names) + _NPAR[structure]
    return SimpleNamespace(structure=structure, correlation=correlation, method=method,
                           names=names, loglik=loglik, n_params=k,
                           aic=-2 * loglik + 2 * k, bic=-2 * loglik + np.log(m) * k,
                           converged=converged, boundary=(), n_obs=n, n_subjects=m,
                           label=f"{structure} {method}")


def test_intercept_vs_slope_uses_half_chi2_1_2_mixture():
    a, b = _fake("intercept", -1000.0), _fake("intercept+slope", -996.3)
    r = likelihood_ratio(a, b)
    x = 2 * (-996.3 + 1000.0)
    # reference: brute-force mixture with scipy.stats.chi2 (Self & Liang 1987)
    ref = 0.5 * stats.chi2.sf(x, 1) + 0.5 * stats.chi2.sf(x, 2)
    np.testing.assert_allclose(r.statistic, x, rtol=1e-12)
    np.testing.assert_allclose(r.p, ref, rtol=1e-12)
    np.testing.assert_allclose(r.p_naive, stats.chi2.sf(x, 2), rtol=1e-12)
    assert r.df == 2 and "0.5·χ²(1) + 0.5·χ²(2)" in r.reference


def test_adding_random_intercept_uses_chi2_0_1_mixture():
    for null, alt in (("independence", "intercept"), ("serial", "intercept+serial")):
        r = likelihood_ratio(_fake(null, -500.0), _fake(alt, -498.0))
        # reference: 0.5·χ²_0 (point mass at 0) + 0.5·χ²_1 via scipy
        np.testing.assert_allclose(r.p, 0.5 * stats.chi2.sf(4.0, 1), rtol=1e-12)
        assert r.df == 1


def test_nesting_table_parameter_counts():
    # reference: parameter counts of each structure listed in this test (brute force)
    for n in NESTED:
        assert n.null in STRUCTURES and n.alt in STRUCTURES
        assert n.df == _NPAR[n.alt] - _NPAR[n.null]
        assert 1 <= n.n_boundary <= n.df
        if n.mixture is not None:
            np.testing.assert_allclose(sum(w for w, _ in n.mixture), 1.0, rtol=0, atol=1e-12)


def test_serial_addition_reports_naive_chi2():
    r = likelihood_ratio(_fake("intercept", -10.0), _fake("intercept+serial", -7.0))
    np.testing.assert_allclose(r.p, stats.chi2.sf(6.0, 2), rtol=1e-12)  # reference: scipy
    assert r.mixture is None and "approximation" in r.reference


def test_mixture_sf_zero_statistic_is_one():
    assert mixture_sf(0.0, ((0.5, 0), (0.5, 1))) == 1.0
    np.testing.assert_allclose(mixture_sf(3.0, ((0.5, 1), (0.5, 2))),
                               0.5 * stats.chi2.sf(3.0, 1) + 0.5 * stats.chi2.sf(3.0, 2),
                               rtol=1e-12)  # reference: scipy


def test_refusals():
    with pytest.raises(ModelError, match="not nested"):
        likelihood_ratio(_fake("intercept+slope", -1.0), _fake("intercept+serial", -1.0))
    with pytest.raises(ModelError, match="swap them"):
        likelihood_ratio(_fake("intercept+slope", -1.0), _fake("intercept", -2.0))
    with pytest.raises(ModelError, match="REML likelihoods are comparable only"):
        likelihood_ratio(_fake("intercept", -1.0),
                         _fake("intercept", -1.0, names=("intercept", "time", "x")))
    with pytest.raises(ModelError, match="different data"):
        likelihood_ratio(_fake("intercept", -1.0), _fake("intercept+slope", -1.0, n=301))
    with pytest.raises(ModelError, match="not nested"):
        likelihood_ratio(_fake("serial", -1.0),
                         _fake("intercept+serial", -1.0, correlation="gaussian"))


def test_ml_mean_model_lrt():
    a = _fake("intercept", -100.0, method="ml")
    b = _fake("intercept", -97.5, method="ml", names=("intercept", "time", "x"))
    r = likelihood_ratio(a, b)
    assert r.kind == "mean" and r.df == 1
    np.testing.assert_allclose(r.p, stats.chi2.sf(5.0, 1), rtol=1e-12)  # reference: scipy


def test_comparison_table_recomputes_criteria_and_warns():
    fits = [_fake("intercept", -1000.0), _fake("intercept+slope", -990.0),
            _fake("intercept+slope+serial", -985.0, converged=False)]
    df = comparison_table(fits)
    # reference: AIC/BIC recomputed from loglik and n_params in the test
    k = np.array([f.n_params for f in fits])
    ll = np.array([f.loglik for f in fits])
    np.testing.assert_allclose(df["aic"], -2 * ll + 2 * k, rtol=1e-12)
    np.testing.assert_allclose(df["bic"], -2 * ll + np.log(50) * k, rtol=1e-12)
    # delta against the best converged fit only
    np.testing.assert_allclose(df["delta_aic"], df["aic"] - df["aic"][:2].min(), rtol=1e-12)
    assert df.attrs["warning"] is None
    mixed = comparison_table([fits[0], _fake("intercept", -900.0, names=("intercept",))])
    assert "REML fits with different mean models" in mixed.attrs["warning"]


def test_real_fits_lrt_and_aic():
    rng = np.random.default_rng(11)
    m = 60
    t = np.tile(np.arange(5.0), m)
    subj = np.repeat(np.arange(m), 5)
    b0, b1 = rng.normal(0, 2, m), rng.normal(0, 0.5, m)
    y = 10 + b0[subj] + (1 + b1[subj]) * t + rng.normal(0, 1, t.size)
    p = Panel.from_codes(subj, t, y)
    X = np.column_stack([np.ones(p.n_obs), p.time])
    f0 = fit_mixed(p, X, names=("intercept", "time"), structure="intercept")
    f1 = fit_mixed(p, X, names=("intercept", "time"), structure="intercept+slope")
    # reference: AIC recomputed from the fit's loglik and n_params (definition)
    np.testing.assert_allclose(f1.aic, -2 * f1.loglik + 2 * f1.n_params, rtol=1e-12)
    r = likelihood_ratio(f0, f1)
    x = 2 * (f1.loglik - f0.loglik)
    np.testing.assert_allclose(r.p, 0.5 * stats.chi2.sf(x, 1) + 0.5 * stats.chi2.sf(x, 2),
                               rtol=1e-10)  # reference: scipy mixture
    assert nested_pairs([f0, f1]) == [(0, 1)]


def test_mixture_p_value_at_published_critical_value():
    # Stram & Lee (1994), Biometrics 50, 1171–1177: the 5% critical value of the 50:50
    # mixture of χ²(1) and χ²(2) (adding a random slope) is 5.14 (published table value,
    # recalled from memory). The LRT p-value at that statistic must be 0.05 to 3 decimals.
    a, b = _fake("intercept", -1000.0), _fake("intercept+slope", -1000.0 + 5.14 / 2)
    r = likelihood_ratio(a, b)
    assert abs(r.p - 0.05) < 5e-4, r.p
    # and the 0.5·χ²(0) + 0.5·χ²(1) mixture has the published 5% critical value 2.71
    # (Self & Liang 1987; the χ²(1) 10% point, recalled from memory)
    r = likelihood_ratio(_fake("independence", -500.0), _fake("intercept", -500.0 + 2.71 / 2))
    assert abs(r.p - 0.05) < 5e-4, r.p
