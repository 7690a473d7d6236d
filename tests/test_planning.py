"""Study planning from a fitted covariance: closed forms, brute force, statsmodels, simulation."""
from __future__ import annotations

import json
import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats
from statsmodels.stats.power import normal_power

from analysis.errors import ModelError, SettingsError
from analysis.models.mixed.likelihood import Group, covariance_stack
from analysis.models.mixed.structures import components, spec_for, theta_from_natural
from analysis.models.planning import (CovarianceModel, PlanInputs, compare_plans, pattern_probabilities,
                               plan_study, power_at, simulate_planned_cohort, simulate_power,
                               subject_information, time_information)

SCHEDULE = (0.0, 3.0, 6.0, 12.0, 18.0, 24.0)
FULL = CovarianceModel.of("intercept+slope+serial",
                          {"intercept_var": 120.0, "slope_var": 0.05, "intercept_slope_cov": -0.9,
                           "serial_var": 30.0, "range": 8.0, "error_var": 15.0},
                          correlation="gaussian")
THREE = CovarianceModel.of("intercept+serial",
                           {"intercept_var": 60.0, "serial_var": 40.0, "range": 10.0,
                            "error_var": 20.0}, correlation="exponential")


def _st2(times):
    t = np.asarray(times)
    return float(((t - t.mean()) ** 2).sum())


# ----------------------------------------------------------------------------- closed forms
def test_compound_symmetry_matches_closed_form():
    sigma2, rho, d = 50.0, 0.6, 0.3
    cov = CovarianceModel.of("intercept", {"intercept_var": sigma2 * rho,
                                           "error_var": sigma2 * (1 - rho)})
    plan = plan_study(PlanInputs(cov, d, SCHEDULE, design="two-groups", alpha=0.05, power=0.9))
    st2 = _st2(SCHEDULE)
    # Diggle, Heagerty, Liang & Zeger (2002), Analysis of Longitudinal Data, §2.4 (recalled
    # from memory): Var(slope difference) = 2σ²(1−ρ)/(s_t² m) with m subjects per group, so
    # one subject of the total (m = n/2) carries 4σ²(1−ρ)/s_t².
    np.testing.assert_allclose(plan.unit_variance, 4 * sigma2 * (1 - rho) / st2, rtol=1e-10)
    # same source: m = 2(z_{1−α/2} + z_power)² σ²(1−ρ)/(s_t² d²) per group (quantiles: scipy)
    z = stats.norm.ppf(0.975) + stats.norm.ppf(0.9)
    m = 2 * z**2 * sigma2 * (1 - rho) / (st2 * d**2)
    assert math.ceil(m) - 1 <= plan.per_group <= math.ceil(m), (plan.per_group, m)
    assert plan.subjects_needed == 2 * plan.per_group
    np.testing.assert_allclose(plan.standard_error,
                               math.sqrt(2 * sigma2 * (1 - rho) / (st2 * plan.per_group)),
                               rtol=1e-10)


def test_random_intercept_and_slope_matches_closed_form():
    v = {"intercept_var": 90.0, "slope_var": 0.04, "intercept_slope_cov": -0.5, "error_var": 25.0}
    cov = CovarianceModel.of("intercept+slope", v)
    st2 = _st2(SCHEDULE)
    # Fitzmaurice, Laird & Ware (2011), Applied Longitudinal Analysis, ch. 8 and 20 (recalled
    # from memory): balanced, complete data, GLS slope = per-subject OLS slope with variance
    # σ_b1² + σ_e²/s_t², so the slope difference of two groups of m has 2(σ_e²/s_t² + σ_b1²)/m.
    per_subject = v["error_var"] / st2 + v["slope_var"]
    two = plan_study(PlanInputs(cov, 0.1, SCHEDULE, design="two-groups"))
    np.testing.assert_allclose(two.unit_variance, 4 * per_subject, rtol=1e-10)
    np.testing.assert_allclose(two.standard_error ** 2, 2 * per_subject / two.per_group,
                               rtol=1e-10)
    # same source, continuous x: Var(β̂_{time×x}) = (σ_b1² + σ_e²/s_t²)/(n Var x), Var x from numpy
    x = np.random.default_rng(3).gamma(2.0, size=300)
    cont = plan_study(PlanInputs(cov, 0.02, SCHEDULE, covariate=x))
    np.testing.assert_allclose(cont.unit_variance, per_subject / x.var(), rtol=1e-10)


def test_power_matches_statsmodels_normal_power():
    plan = plan_study(PlanInputs(THREE, -0.05, SCHEDULE, covariate=np.linspace(-2, 2, 41),
                                 dropout_rate=0.02, alpha=0.01, power=0.85))
    n = np.array([k for k, _ in plan.power_curve])
    p = np.array([q for _, q in plan.power_curve])
    # statsmodels normal_power: two-sided z-test power with standardised effect δ/sd per unit
    ref = normal_power(abs(plan.inputs.effect) / math.sqrt(plan.unit_variance), n, 0.01,
                       alternative="two-sided")
    np.testing.assert_allclose(p, ref, rtol=1e-10)
    # smallest size: power reaches the target there and not one subject earlier (brute force)
    assert plan.achieved_power >= 0.85
    assert power_at(plan.subjects_needed - 1, -0.05, plan.unit_variance, 0.01) < 0.85
    assert plan.subjects_needed in n and n.max() >= 2 * plan.subjects_needed - 1


# ----------------------------------------------------------------------------- brute force
def test_covariance_matches_the_fitting_engine():
    t = np.asarray(SCHEDULE)
    for model in (FULL, THREE):
        spec = spec_for(model.structure)
        comp = components(spec, theta_from_natural(spec, model.variance, 1.0))
        Z = np.ones((1, t.size, spec.n_random))
        if spec.n_random == 2:
            Z[0, :, 1] = t
        g = Group(np.array([0]), np.arange(t.size)[None], np.zeros((1, t.size, 1)),
                  np.zeros((1, t.size)), Z, np.abs(t[:, None] - t[None, :])[None])
        # reference: the likelihood's own covariance blocks (analysis.models.mixed.likelihood)
        ref = covariance_stack(g, comp, model.correlation)[0]
        np.testing.assert_allclose(model.covariance(t), ref, rtol=1e-12)


def test_information_with_dropout_matches_a_loop_over_patterns():
    rate = 0.04
    x = np.array([-1.5, -0.2, 0.0, 0.7, 2.1])
    inputs = PlanInputs(FULL, 0.02, SCHEDULE, covariate=x, dropout_rate=rate)
    t = np.asarray(SCHEDULE)
    V = FULL.covariance(t)
    # independent brute force: pattern k (first k visits) with probability
    # exp(−λ t_k) − exp(−λ t_{k+1}), explicit inverse of each leading block, explicit x loop
    info = np.zeros((4, 4))
    for k in range(1, t.size + 1):
        pk = math.exp(-rate * t[k - 1]) - (math.exp(-rate * t[k]) if k < t.size else 0.0)
        Vinv = np.linalg.inv(V[:k, :k])
        for xi in x:
            tk = t[:k]
            X = np.column_stack([np.ones(k), tk, np.full(k, xi), tk * xi])
            info += pk * X.T @ Vinv @ X / x.size
    np.testing.assert_allclose(subject_information(inputs), info, rtol=1e-10, atol=1e-14)
    probs = pattern_probabilities(SCHEDULE, rate)
    assert probs.shape == (t.size + 1,)
    np.testing.assert_allclose(probs.sum(), 1.0, rtol=1e-12)  # brute force: a distribution
    np.testing.assert_allclose(probs[0], 0.0, atol=0)  # first visit at the origin: exp(0) = 1


def test_zero_dropout_is_the_complete_data_information():
    t = np.asarray(SCHEDULE)
    A = np.column_stack([np.ones(t.size), t])
    # brute force: AᵀV⁻¹A by numpy's solve
    ref = A.T @ np.linalg.solve(THREE.covariance(t), A)
    np.testing.assert_allclose(time_information(THREE, t, 0.0), ref, rtol=1e-10)
    a = plan_study(PlanInputs(THREE, 0.1, SCHEDULE, design="two-groups", dropout_rate=0.0))
    # complete data with two groups: unit variance 4·[(AᵀV⁻¹A)⁻¹]_time,time (numpy inverse)
    np.testing.assert_allclose(a.unit_variance, 4 * np.linalg.inv(ref)[1, 1], rtol=1e-10)


@settings(max_examples=40, deadline=None)
@given(r1=st.floats(0.0, 0.3), extra=st.floats(0.0, 0.3),
       design=st.sampled_from(["two-groups", "continuous"]))
def test_dropout_never_reduces_subjects_needed(r1, extra, design):
    # property (brute-force comparison of two plans): losing later visits cannot add information
    kw = {"covariate": (-1.0, 0.0, 0.5, 2.0)} if design == "continuous" else {}
    base = dict(covariance=FULL, effect=0.05, schedule=SCHEDULE, design=design, **kw)
    lo = plan_study(PlanInputs(dropout_rate=r1, **base))
    hi = plan_study(PlanInputs(dropout_rate=r1 + extra, **base))
    assert hi.unit_variance >= lo.unit_variance * (1 - 1e-12)
    assert hi.subjects_needed >= lo.subjects_needed
    none = plan_study(PlanInputs(dropout_rate=0.0, **base))
    assert lo.subjects_needed >= none.subjects_needed


def test_simulated_cohort_follows_dropout_and_covariance():
    rate = 0.03
    inputs = PlanInputs(THREE, 0.0001, SCHEDULE, design="two-groups", dropout_rate=rate)
    n = 20000
    panel, X = simulate_planned_cohort(inputs, n, np.random.default_rng(5))
    t = np.asarray(SCHEDULE)
    share = np.array([(panel.time == tj).sum() for tj in t]) / n
    # brute force: binomial share of subjects still followed at t_j, within 4 SE of exp(−λ t_j)
    expect = np.exp(-rate * t)
    assert np.all(np.abs(share - expect) <= 4 * np.sqrt(expect * (1 - expect) / n) + 1e-12)
    np.testing.assert_array_equal(X[:, 3], X[:, 1] * X[:, 2])
    full = panel.counts == t.size
    rows = panel.starts[full][:, None] + np.arange(t.size)
    resid = panel.y[rows] - 0.0001 * X[rows, 3]
    # numpy sample covariance of complete subjects against V (loose: sampling error ~2%)
    np.testing.assert_allclose(np.cov(resid, rowvar=False), THREE.covariance(t), rtol=0.1,
                               atol=3.0)


# ----------------------------------------------------------------------------- per model
def test_compare_plans_lists_each_model():
    ri = CovarianceModel.of("intercept", {"intercept_var": 100.0, "error_var": 30.0})
    json_entry = {"name": "intercept+slope (REML)", "structure": "intercept+slope",
                  "correlation": None,
                  "variance": {"intercept_var": {"estimate": 150.0, "lo": 1, "hi": 2},
                               "slope_var": {"estimate": 0.05, "lo": 1, "hi": 2},
                               "intercept_slope_cov": {"estimate": -0.8, "lo": 1, "hi": 2},
                               "error_var": {"estimate": 29.0, "lo": 1, "hi": 2}}}
    singular = CovarianceModel.of("intercept", {"intercept_var": 10.0, "error_var": 0.0},
                                  name="no error")
    inputs = PlanInputs(THREE, 0.05, SCHEDULE, design="two-groups", dropout_rate=0.01)
    comp = compare_plans(inputs, [ri, json_entry, THREE, singular])
    frame = comp.to_frame()
    assert list(frame["name"]) == ["intercept", "intercept+slope (REML)", "intercept+serial",
                                   "no error"]
    # brute force: each row is the plan made for that covariance alone
    for model, row in zip([ri, CovarianceModel.from_json(json_entry), THREE], comp.rows):
        alone = plan_study(PlanInputs(model, 0.05, SCHEDULE, design="two-groups",
                                      dropout_rate=0.01))
        assert row["subjects_needed"] == alone.subjects_needed and row["error"] is None
    assert comp.rows[3]["subjects_needed"] is None
    assert "not positive definite" in comp.rows[3]["error"]
    json.dumps(comp.to_json())


def test_from_fit_reads_a_fitted_model():
    from analysis.models.mixed import fit_mixed
    from analysis.models.mixed.simulate import simulate_cohort

    s = simulate_cohort(60, seed=11, serial_var=0.0)
    fit = fit_mixed(s.panel, s.X, names=s.names, structure="intercept+slope")
    cov = CovarianceModel.from_fit(fit)
    assert cov.variance == fit.variance and cov.correlation is None
    # brute force: a fitted model and its JSON give the same plan
    a = compare_plans(PlanInputs(THREE, 0.05, SCHEDULE, design="two-groups"), [fit, fit.to_json()])
    assert a.rows[0]["subjects_needed"] == a.rows[1]["subjects_needed"] is not None
    named = compare_plans(PlanInputs(THREE, 0.05, SCHEDULE, design="two-groups"), {"mine": fit})
    assert named.rows[0]["name"] == "mine"
    assert named.rows[0]["subjects_needed"] == a.rows[0]["subjects_needed"]


# ----------------------------------------------------------------------------- json, errors
def test_json_carries_every_input_and_the_cautions():
    x = np.linspace(-1, 3, 9)
    plan = plan_study(PlanInputs(FULL, 0.03, SCHEDULE, covariate=x, dropout_rate=0.02))
    out = json.loads(json.dumps(plan.to_json()))
    a = out["assumptions"]
    assert a["schedule"] == list(SCHEDULE) and a["dropout_rate"] == 0.02
    assert a["alpha"] == 0.05 and a["power"] == 0.8 and a["effect"] == 0.03
    assert a["covariance"]["variance"] == FULL.variance
    assert a["covariance"]["correlation"] == "gaussian"
    np.testing.assert_allclose(a["covariate"]["variance"], x.var(), rtol=1e-12)  # numpy var
    assert any("statistician" in c for c in out["cautions"])
    assert any("effect" in c and "decision" in c for c in out["cautions"])
    assert out["subjects_needed"] == plan.subjects_needed and out["per_group"] is None
    assert len(plan.to_frame()) == len(out["power_curve"])


@pytest.mark.parametrize("kw, match", [
    ({"schedule": (0.0,)}, "at least two"),
    ({"schedule": (0.0, 6.0, 6.0)}, "strictly increasing"),
    ({"schedule": (-1.0, 6.0)}, ">= 0"),
    ({"effect": 0.0}, "non-zero"),
    ({"alpha": 1.5}, "alpha"),
    ({"power": 0.01}, "between alpha"),
    ({"dropout_rate": -0.1}, "dropout_rate"),
    ({"design": "three-arms"}, "not known"),
    ({"covariate": (1.0, 2.0)}, "only by the continuous"),
    ({"design": "continuous"}, "variation"),
])
def test_bad_inputs_get_clear_messages(kw, match):
    base = dict(covariance=THREE, effect=0.05, schedule=SCHEDULE, design="two-groups")
    with pytest.raises(SettingsError, match=match):
        PlanInputs(**{**base, **kw})


def test_bad_covariance_is_refused():
    with pytest.raises(ModelError, match="needs the variance parameter"):
        CovarianceModel.of("intercept+serial", {"intercept_var": 1.0, "error_var": 1.0})
    with pytest.raises(ModelError, match="do not belong"):
        CovarianceModel.of("intercept", {"intercept_var": 1.0, "error_var": 1.0, "range": 2.0})
    with pytest.raises(ModelError, match="correlation"):
        CovarianceModel.of("serial", {"serial_var": 1.0, "range": 2.0, "error_var": 1.0},
                           correlation="linear")
    with pytest.raises(ModelError, match=">= 0"):
        CovarianceModel.of("intercept", {"intercept_var": -1.0, "error_var": 1.0})


# ----------------------------------------------------------------------------- simulation
@pytest.mark.slow
def test_simulated_power_agrees_with_analytic():
    # the project's REML engine refitted to cohorts drawn from the planned design: empirical
    # power within 2.5 Monte-Carlo SEs of the analytic value (common practice for MC checks)
    # (a small version of validation/plan_power.py: 100 replications of about 190 subjects)
    inputs = PlanInputs(THREE, -0.2, SCHEDULE, design="two-groups", dropout_rate=0.02)
    plan = plan_study(inputs)
    check = simulate_power(inputs, reps=100, seed=2026)
    assert check.reps + check.n_failed == 100 and check.subjects == plan.subjects_needed
    assert abs(check.empirical_power - check.analytic_power) <= 2.5 * check.mcse, check
    # the SD of the estimates matches the analytic SE (F test of variances at 1%, scipy chi²)
    ratio = check.empirical_sd**2 / check.analytic_se**2
    lo, hi = stats.chi2.ppf([0.005, 0.995], check.reps - 1) / (check.reps - 1)
    assert lo <= ratio <= hi, ratio
