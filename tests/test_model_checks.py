"""Model checks (analysis.models.checks): decorrelated residuals, predicted random effects and
each subject's predictions.

References: statsmodels MixedLM (its ``random_effects`` and ``fittedvalues``), statsmodels
``ProbPlot`` for the normal scores, and a dense per-subject numpy computation written here
for the decorrelated residuals and the serial prediction; simulated cohorts with known
generating parameters for the N(0, 1) behaviour.
"""
from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from scipy import linalg as sla
from statsmodels.graphics.gofplots import ProbPlot

from analysis.errors import ModelError
from analysis.models.checks import (checks_for, model_checks, normal_scores, quartile_line,
                                    thin_quantiles, thin_rows)
from analysis.models.mixed import fit_mixed
from analysis.models.mixed.simulate import simulate_cohort


def _mixedlm(sim, structure):
    """statsmodels MixedLM by REML, time scaled by c = max|t| for its optimiser (as in
    tests/test_mixed_reference.py), random effects mapped back to the user's time unit."""
    p = sim.panel
    c = float(np.max(np.abs(p.time)))
    d = np.array([1.0, 1.0 / c, 1.0, 1.0 / c])
    re = np.column_stack([np.ones(p.n_obs), p.time / c]) if structure == "intercept+slope" \
        else np.ones((p.n_obs, 1))
    model = sm.MixedLM(p.y, sim.X * d, groups=p.codes, exog_re=re)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        res = model.fit(reml=True, method=["bfgs", "lbfgs"], gtol=1e-10, maxiter=2000)
    b = np.array([np.asarray(res.random_effects[k], dtype=float) for k in range(p.n_subjects)])
    if b.shape[1] == 2:
        b[:, 1] /= c
    return res, b


@pytest.mark.parametrize("structure", ["intercept", "intercept+slope"])
def test_random_effects_and_fitted_values_match_mixedlm(structure):
    sim = simulate_cohort(80, seed=11, visits=(3, 7), follow_up=36.0, serial_var=0.0,
                          slope_var=0.04 if structure == "intercept+slope" else 0.0,
                          intercept_slope_cov=-0.48 if structure == "intercept+slope" else 0.0)
    fit = fit_mixed(sim.panel, sim.X, names=sim.names, structure=structure)
    res, b_ref = _mixedlm(sim, structure)
    ch = model_checks(fit)
    # tolerance from how closely the two fits agree: the largest relative difference of the
    # variance parameters (both REML optima of one likelihood), with a floor of 1e-6
    ref_var = [np.atleast_2d(np.asarray(res.cov_re))[0, 0], res.scale]
    ours = [fit.variance["intercept_var"], fit.variance["error_var"]]
    agree = max(1e-6, max(abs(a - b) / abs(b) for a, b in zip(ours, ref_var)))
    tol = 50 * agree
    # reference library: statsmodels MixedLM random_effects (BLUPs)
    names = ch.effect_names
    assert names == (("intercept",) if structure == "intercept" else ("intercept", "slope"))
    for j, nm in enumerate(names):
        ours_b = ch.effects[nm].to_numpy(float)
        scale = np.std(b_ref[:, j])
        np.testing.assert_allclose(ours_b, b_ref[:, j], rtol=0, atol=tol * scale)
    # reference library: MixedLM fittedvalues = Xβ̂ + Zb̂ (the subject's own prediction)
    spread = np.std(sim.panel.y)
    np.testing.assert_allclose(ch.visits["subject_fitted"].to_numpy(),
                               np.asarray(res.fittedvalues), rtol=0, atol=tol * spread)
    # and the population prediction Xβ̂ with MixedLM's fixed effects
    pop = sim.X * np.array([1.0, 1.0 / np.max(sim.panel.time), 1.0, 1.0 / np.max(sim.panel.time)])
    np.testing.assert_allclose(ch.visits["fitted"].to_numpy(), pop @ np.asarray(res.fe_params),
                               rtol=0, atol=tol * spread)
    assert not ch.serial and ch.visits["serial_fitted"].isna().all()


@pytest.mark.parametrize("structure", ["intercept+serial", "intercept+slope+serial"])
def test_decorrelated_residuals_and_serial_prediction_brute_force(structure):
    sim = simulate_cohort(25, seed=3, visits=(2, 6), follow_up=24.0, range=6.0)
    fit = fit_mixed(sim.panel, sim.X, names=sim.names, structure=structure)
    ch = model_checks(fit, subject_ids=[f"s{k}" for k in range(sim.panel.n_subjects)])
    p, v = sim.panel, fit.variance
    r = p.y - sim.X @ fit.beta
    white, serial, own = np.empty(p.n_obs), np.empty(p.n_obs), np.empty(p.n_obs)
    for s, n in zip(p.starts, p.counts):          # per-subject loop on purpose (reference)
        sl = slice(s, s + n)
        t = p.time[sl]
        Z = np.ones((n, 1))
        G = np.array([[v["intercept_var"]]])
        if "slope_var" in v:
            Z = np.column_stack([np.ones(n), t])
            G = np.array([[v["intercept_var"], v["intercept_slope_cov"]],
                          [v["intercept_slope_cov"], v["slope_var"]]])
        R = v["serial_var"] * np.exp(-np.abs(t[:, None] - t[None, :]) / v["range"])
        V = Z @ G @ Z.T + R + v["error_var"] * np.eye(n)
        L = np.linalg.cholesky(V)
        white[sl] = sla.solve_triangular(L, r[sl], lower=True)
        a = np.linalg.solve(V, r[sl])
        serial[sl] = R @ a
        own[sl] = sim.X[sl] @ fit.beta + Z @ (G @ Z.T @ a)
    # dense brute force: L⁻¹r with V = LLᵀ per subject, and σ²R V⁻¹r
    np.testing.assert_allclose(ch.visits["standardised"].to_numpy(), white, rtol=1e-8, atol=1e-10)
    np.testing.assert_allclose(ch.visits["subject_fitted"].to_numpy(), own, rtol=1e-8,
                               atol=1e-8)
    np.testing.assert_allclose(ch.visits["serial_fitted"].to_numpy(), own + serial, rtol=1e-8,
                               atol=1e-8)
    assert ch.serial
    assert ch.visits["subject"].iloc[0] == "s0" and len(ch.subject("s3")) == p.counts[3]


def test_decorrelated_residuals_are_standard_normal_on_simulated_data():
    # simulated data with known truth (the generator's intercept + slope + exponential serial
    # covariance), fitted with the true structure: the decorrelated residuals should be close
    # to independent N(0, 1) — mean within 4 standard errors of 0, variance within 0.08 of 1
    sim = simulate_cohort(300, seed=21, visits=(3, 8), follow_up=48.0, range=10.0)
    fit = fit_mixed(sim.panel, sim.X, names=sim.names, structure="intercept+slope+serial")
    ch = model_checks(fit)
    r = ch.visits["standardised"].to_numpy()
    assert abs(r.mean()) < 4 / np.sqrt(r.size)
    assert abs(r.var() - 1) < 0.08
    # the plain marginal residuals are correlated within subjects; the decorrelated ones are
    # not: lag-one correlation of consecutive visits of a subject (brute force here)
    same = np.diff(sim.panel.codes) == 0
    raw = ch.visits["residual"].to_numpy()
    c_raw = np.corrcoef(raw[:-1][same], raw[1:][same])[0, 1]
    c_std = np.corrcoef(r[:-1][same], r[1:][same])[0, 1]
    assert c_raw > 0.5 and abs(c_std) < 0.1
    s = ch.summary()
    assert s["n_obs"] == sim.panel.n_obs and s["n_subjects"] == 300


def test_normal_scores_match_statsmodels_probplot():
    x = np.random.default_rng(4).gamma(2.0, size=57)
    # reference library: statsmodels ProbPlot with Blom's a = 3/8 gives the sorted quantiles
    ref = ProbPlot(x, a=0.375).theoretical_quantiles
    np.testing.assert_allclose(np.sort(normal_scores(x)), ref, rtol=1e-12)
    np.testing.assert_allclose(normal_scores(x)[np.argsort(x)], ref, rtol=1e-12)
    with_nan = np.r_[x, np.nan]
    assert np.isnan(normal_scores(with_nan)[-1])


def test_quartile_line_passes_through_the_quartiles():
    x = np.random.default_rng(2).normal(3.0, 2.0, size=5001)
    a, b = quartile_line(x)
    from scipy import stats
    # brute force: the line evaluated at the normal quartiles gives the sample quartiles
    q = np.quantile(x, [0.25, 0.75])
    np.testing.assert_allclose(a + b * stats.norm.ppf([0.25, 0.75]), q, rtol=1e-12)


def test_thinning_is_seeded_bounded_and_keeps_what_is_asked():
    rows = thin_rows(10_000, 500, seed=3, keep=[7, 9999])
    assert 500 <= rows.size <= 502 and {7, 9999} <= set(rows.tolist())
    np.testing.assert_array_equal(rows, thin_rows(10_000, 500, seed=3, keep=[7, 9999]))
    assert not np.array_equal(rows, thin_rows(10_000, 500, seed=4, keep=[7, 9999]))
    np.testing.assert_array_equal(thin_rows(40, 500), np.arange(40))
    s = np.random.default_rng(1).normal(size=5000)
    q = thin_quantiles(s, 400, tail=25)
    assert q.size <= 400
    order = np.argsort(s)
    # the 25 most extreme at each end are kept (where a quantile plot is read)
    assert set(order[:25]) <= set(q.tolist()) and set(order[-25:]) <= set(q.tolist())


def test_checks_for_a_model_set_names_the_cohort_subjects():
    from analysis.preparation.demo import demo_roles, demo_settings, load_demo
    from analysis.preparation.loading import Dataset
    from analysis.models.modelstage import ModelChoices
    from analysis.pipeline import Workbench

    df = load_demo()
    keep = df["recipient_id"].drop_duplicates().iloc[:60]
    df = df[df["recipient_id"].isin(keep)].reset_index(drop=True)
    wb = Workbench()
    ds = Dataset.from_frame(df, name="slice")
    roles, settings = demo_roles(), demo_settings()
    models = wb.models(ds, roles, settings, ModelChoices(structures=("intercept",), gee=()))
    cohort = wb.cohort(ds, roles, settings)
    ch = checks_for(cohort, models)
    assert ch.model == models.preferred
    ids = set(pd.Series(cohort.subject_ids).astype(str))
    assert set(ch.effects["subject"]) <= ids and ch.n_subjects == models.n_subjects
    # the first subject's visits and response are the cohort's (pandas selection)
    first = str(cohort.subject_ids[0])
    rows = cohort.frame[cohort.frame["subject"].astype(str) == first]
    np.testing.assert_allclose(ch.subject(first)["response"].to_numpy(),
                               rows["response"].to_numpy())
    with pytest.raises(ModelError, match="no model was fitted"):
        checks_for(cohort, type("Empty", (), {"fits": {}, "preferred": None})())
