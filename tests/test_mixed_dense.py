"""Batched engine vs an independent dense implementation written here (brute force).

The dense reference builds the full block-diagonal covariance of all
observations with scipy.linalg.block_diag, evaluates the (RE)ML formula
directly (Verbeke & Molenberghs, 2000, §5.3) and maximises it with
scipy.optimize.minimize on its own parameterisation.
"""
from __future__ import annotations

import numpy as np
import pytest
from scipy import linalg as sla
from scipy import optimize

from analysis.models.mixed import fit_mixed
from analysis.models.mixed.likelihood import build_groups, evaluate
from analysis.models.mixed.simulate import simulate_cohort
from analysis.models.mixed.structures import spec_for, theta_from_natural

SERIAL = ["serial", "intercept+serial", "intercept+slope+serial"]


@pytest.fixture(scope="module")
def small():
    # simulated cohort with every component present (exponential serial process)
    return simulate_cohort(30, seed=5, visits=(2, 6), follow_up=24.0, range=6.0)


# ------------------------------------------------------------------ dense reference
def _dense_V(panel, nat, correlation):
    blocks = []
    for s, n in zip(panel.starts, panel.counts):
        t = panel.time[s:s + n]
        V = np.eye(n) * nat["error_var"]
        if "intercept_var" in nat:
            Z = np.ones((n, 1))
            G = np.array([[nat["intercept_var"]]])
            if "slope_var" in nat:
                Z = np.column_stack([np.ones(n), t])
                G = np.array([[nat["intercept_var"], nat["intercept_slope_cov"]],
                              [nat["intercept_slope_cov"], nat["slope_var"]]])
            V = V + Z @ G @ Z.T
        if "serial_var" in nat:
            u = np.abs(t[:, None] - t[None, :]) / nat["range"]
            rho = np.exp(-u) if correlation == "exponential" else np.exp(-u**2)
            V = V + nat["serial_var"] * rho
        blocks.append(V)
    return sla.block_diag(*blocks)


def _dense_loglik(panel, X, nat, correlation, method):
    V = _dense_V(panel, nat, correlation)
    Vi = np.linalg.inv(V)
    M = X.T @ Vi @ X
    beta = np.linalg.solve(M, X.T @ Vi @ panel.y)
    r = panel.y - X @ beta
    N, p = X.shape
    ll = -0.5 * (np.linalg.slogdet(V)[1] + r @ Vi @ r)
    if method == "reml":
        return ll - 0.5 * ((N - p) * np.log(2 * np.pi) + np.linalg.slogdet(M)[1])
    return ll - 0.5 * N * np.log(2 * np.pi)


def _dense_nat(structure, x):
    """Dense parameterisation: logs of variances/range, tanh for the correlation."""
    spec = spec_for(structure)
    nat, k = {}, 0
    if spec.n_random >= 1:
        nat["intercept_var"] = np.exp(x[k]); k += 1
    if spec.n_random == 2:
        nat["slope_var"] = np.exp(x[k])
        nat["intercept_slope_cov"] = np.tanh(x[k + 1]) * np.sqrt(nat["intercept_var"] *
                                                                nat["slope_var"])
        k += 2
    if spec.serial:
        nat["serial_var"], nat["range"] = np.exp(x[k]), np.exp(x[k + 1]); k += 2
    nat["error_var"] = np.exp(x[k])
    return nat


def _dense_fit(panel, X, structure, correlation, method):
    spec = spec_for(structure)
    x0 = []
    if spec.n_random >= 1:
        x0.append(np.log(100.0))
    if spec.n_random == 2:
        x0 += [np.log(0.05), 0.0]
    if spec.serial:
        x0 += [np.log(20.0), np.log(5.0)]
    x0.append(np.log(20.0))
    def f(x):
        with np.errstate(over="ignore"):
            return -_dense_loglik(panel, X, _dense_nat(structure, x), correlation, method)
    best = optimize.minimize(f, np.array(x0), method="Nelder-Mead",
                             options={"xatol": 1e-9, "fatol": 1e-11, "maxiter": 20000,
                                      "maxfev": 20000})
    best = optimize.minimize(f, best.x, method="BFGS", options={"gtol": 1e-8})
    return -best.fun, _dense_nat(structure, best.x)


# ------------------------------------------------------------------ tests
FIXED_CASES = [(s, "exponential") for s in ("independence", "intercept", "intercept+slope")] + \
    [(s, c) for s in SERIAL for c in ("exponential", "gaussian")]
OPTIMUM_CASES = [(s, "exponential", m) for s in SERIAL for m in ("reml", "ml")] + \
    [("serial", "gaussian", "ml"), ("intercept+slope+serial", "gaussian", "reml")]


@pytest.mark.parametrize("structure,correlation", FIXED_CASES)
@pytest.mark.parametrize("method", ["reml", "ml"])
def test_loglik_at_fixed_parameters(small, structure, correlation, method):
    spec = spec_for(structure)
    full = {"intercept_var": 90.0, "slope_var": 0.05, "intercept_slope_cov": -0.7,
            "serial_var": 20.0, "range": 4.0, "error_var": 12.0}
    groups = build_groups(small.panel, small.X, spec, 1.0)
    for factor in (0.5, 1.0, 2.0):
        nat = {k: full[k] * (factor if k != "intercept_slope_cov" else 1.0)
               for k in spec.parameters}
        th = theta_from_natural(spec, nat, 1.0)
        ours = evaluate(groups, spec, th, correlation=correlation, method=method).loglik
        # independent brute force: dense block-diagonal formula
        ref = _dense_loglik(small.panel, small.X, nat, correlation, method)
        np.testing.assert_allclose(ours, ref, rtol=1e-10, atol=0)


@pytest.mark.slow
@pytest.mark.parametrize("structure,correlation,method", OPTIMUM_CASES)
def test_serial_optimum_matches_dense(small, structure, correlation, method):
    fit = fit_mixed(small.panel, small.X, names=small.names, structure=structure,
                    correlation=correlation, method=method)
    assert fit.converged, fit.message
    ll_ref, nat_ref = _dense_fit(small.panel, small.X, structure, correlation, method)
    # independent brute force: dense formula maximised by Nelder-Mead + BFGS
    np.testing.assert_allclose(fit.loglik, ll_ref, rtol=1e-6, atol=0)
    # our reported loglik equals the dense formula at our own estimates
    np.testing.assert_allclose(
        _dense_loglik(small.panel, small.X, fit.variance, correlation, method), fit.loglik,
        rtol=1e-10)


@pytest.mark.parametrize("structure", ["intercept", "intercept+slope", *SERIAL])
@pytest.mark.parametrize("method", ["reml", "ml"])
def test_gradient_matches_finite_differences(small, structure, method):
    spec = spec_for(structure)
    groups = build_groups(small.panel, small.X, spec, 24.0)
    rng = np.random.default_rng(1)
    for correlation in ("exponential", "gaussian"):
        th = rng.normal(0.0, 0.7, spec.n_theta) + 1.0
        ev = evaluate(groups, spec, th, correlation=correlation, method=method)
        h = 1e-6
        fd = np.array([
            (evaluate(groups, spec, th + e, correlation=correlation, method=method).loglik
             - evaluate(groups, spec, th - e, correlation=correlation, method=method).loglik)
            / (2 * h) for e in np.eye(spec.n_theta) * h])
        # independent check: central finite differences of the log-likelihood
        np.testing.assert_allclose(ev.grad, fd, rtol=1e-5, atol=1e-6 * np.abs(fd).max())


@pytest.mark.parametrize("structure", ["intercept+slope", "intercept+serial"])
def test_cov_beta_robust_blups_residuals_brute_force(small, structure):
    fit = fit_mixed(small.panel, small.X, names=small.names, structure=structure)
    p = small.panel
    X = small.X
    V = _dense_V(p, fit.variance, "exponential")
    Vi = np.linalg.inv(V)
    M = X.T @ Vi @ X
    # brute force: (XᵀV⁻¹X)⁻¹ from the dense covariance at the estimates
    np.testing.assert_allclose(fit.cov_beta, np.linalg.inv(M), rtol=1e-8, atol=0)
    beta = np.linalg.solve(M, X.T @ Vi @ p.y)
    np.testing.assert_allclose(fit.beta, beta, rtol=1e-8, atol=1e-10)
    r = p.y - X @ beta
    meat = np.zeros_like(M)
    Minv = np.linalg.inv(M)
    blups, white = [], np.empty(p.n_obs)
    for s, n in zip(p.starts, p.counts):      # per-subject loop on purpose (reference)
        sl = slice(s, s + n)
        Vs = V[sl, sl]
        # Mancl & DeRouen (2001): residuals corrected by the subject's GLS hat block
        Hs = X[sl] @ Minv @ X[sl].T @ np.linalg.inv(Vs)
        u = X[sl].T @ np.linalg.solve(Vs, np.linalg.solve(np.eye(n) - Hs, r[sl]))
        meat += np.outer(u, u)
        L = np.linalg.cholesky(Vs)
        white[sl] = sla.solve_triangular(L, r[sl], lower=True)
        if "slope_var" in fit.variance:
            Z = np.column_stack([np.ones(n), p.time[sl]])
            G = np.array([[fit.variance["intercept_var"], fit.variance["intercept_slope_cov"]],
                          [fit.variance["intercept_slope_cov"], fit.variance["slope_var"]]])
        else:
            Z, G = np.ones((n, 1)), np.array([[fit.variance["intercept_var"]]])
        blups.append(G @ Z.T @ np.linalg.solve(Vs, r[sl]))
    # brute-force bias-reduced sandwich loop (Liang & Zeger, 1986; Mancl & DeRouen, 2001)
    np.testing.assert_allclose(fit.robust_cov_beta, Minv @ meat @ Minv, rtol=1e-8, atol=0)
    np.testing.assert_allclose(fit.standardized_residuals(), white, rtol=1e-8, atol=1e-10)
    b = fit.blups()
    ref = np.array([np.pad(v, (0, 2 - v.size), constant_values=np.nan) for v in blups])
    np.testing.assert_allclose(b[["b0", "b1"]].to_numpy(), ref, rtol=1e-7, atol=1e-9)
    np.testing.assert_array_equal(b["subject"].to_numpy(), np.arange(p.n_subjects))


@pytest.mark.parametrize("structure", ["intercept+slope", "intercept+slope+serial", "serial"])
def test_variogram_and_process_variance_from_covariance(small, structure):
    fit = fit_mixed(small.panel, small.X, names=small.names, structure=structure,
                    correlation="gaussian")
    v = fit.variance
    lags = np.array([0.5, 2.0, 7.5, 20.0])
    t1 = 3.0
    ref_gamma, ref_var = [], []
    for u in lags:
        # brute force: ½Var(Y1 − Y2) from the dense 2×2 model covariance at times t1, t1+u
        from analysis.preparation.panel import Panel
        two = Panel.from_codes(np.array([0, 0]), np.array([t1, t1 + u]), np.zeros(2))
        V = _dense_V(two, v, "gaussian")
        ref_gamma.append(0.5 * (V[0, 0] + V[1, 1] - 2 * V[0, 1]))
        ref_var.append(V[1, 1])
    np.testing.assert_allclose(fit.variogram_curve(lags), ref_gamma, rtol=1e-12)
    np.testing.assert_allclose([fit.process_variance(t1 + u) for u in lags], ref_var, rtol=1e-12)
