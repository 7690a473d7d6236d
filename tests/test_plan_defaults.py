"""Defaults of the next-study plan read from this cohort, each against an independent computation."""
from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest
from scipy import optimize

from analysis.preparation.demo import DEMO_CSV, demo_roles, demo_settings
from analysis.errors import ModelError, SettingsError
from analysis.preparation.loading import Dataset, read_table
from analysis.models.modelstage import ModelChoices
from analysis.pipeline import Workbench
from analysis.models.plan_defaults import (cohort_covariate, dropout_hazard, nice_step, parse_schedule,
                                    plan_from_cohort, typical_schedule)
from analysis.models.planning import CovarianceModel, PlanInputs, plan_study

STRUCTURES = ("intercept", "intercept+slope")


@pytest.fixture(scope="module")
def demo():
    ds = Dataset.from_frame(read_table(DEMO_CSV), name="demo")
    wb = Workbench(max_entries=16, max_model_sets=1)
    r, s = demo_roles(), demo_settings()
    cohort = wb.cohort(ds, r, s)
    models = wb.models(ds, r, s, ModelChoices(structures=STRUCTURES, gee=()))
    dropout = wb.summaries(ds, r, s).dropout
    return cohort, models, dropout


# ----------------------------------------------------------------------------- schedule
def _brute_schedule(times, counts, max_visits=6, steps=30):
    """Independent brute force of the documented rule: sorted-list quantiles by hand."""
    t = sorted(max(0.0, float(v)) for v in times)
    c = sorted(int(v) for v in counts)
    med = (c[(len(c) - 1) // 2] + c[len(c) // 2]) / 2
    k = min(max(int(med), 2), max_visits)
    out = []
    width = (t[-1] - t[0]) / steps
    step = min(m * 10.0 ** e for e in range(-6, 7) for m in (1, 2, 5) if m * 10.0 ** e >= width)
    for j in range(k):
        pos = j * (len(t) - 1) / (k - 1)         # numpy's default "linear" quantile position
        lo = int(math.floor(pos))
        hi = min(lo + 1, len(t) - 1)
        q = t[lo] + (pos - lo) * (t[hi] - t[lo])
        r = round(q / step) * step
        if not out or abs(r - out[-1]) > 1e-9:
            out.append(r)
    return out


def test_nice_step_is_the_smallest_round_step_at_least_the_width():
    # brute force over an explicit list of 1, 2, 5 × 10^k
    cands = sorted(m * 10.0 ** e for e in range(-4, 5) for m in (1, 2, 5))
    for w in (0.013, 0.2, 0.21, 1.0, 2.5, 3.1, 7.0, 40.0, 999.0):
        assert nice_step(w) == pytest.approx(min(c for c in cands if c >= w * (1 - 1e-12)))


def test_typical_schedule_matches_brute_force_and_a_hand_example():
    rng = np.random.default_rng(5)
    times = rng.uniform(0, 47, 400)
    counts = rng.integers(2, 11, 60)
    np.testing.assert_allclose(typical_schedule(times, counts), _brute_schedule(times, counts))
    # by hand: times 0..60 evenly, 6 visits each → quantiles 0, 12, ..., 60 on a step of 2
    assert typical_schedule(np.arange(61.0), [6] * 10) == (0.0, 12.0, 24.0, 36.0, 48.0, 60.0)
    # by hand: median of 2 visits → first and last time, on a step of 0.5 (window 9.5 / 30)
    assert typical_schedule([0.3, 5.0, 9.8], [2, 2, 3]) == (0.5, 10.0)


def test_typical_schedule_of_the_demo_matches_brute_force(demo):
    cohort, _, _ = demo
    got = typical_schedule(cohort.panel.time, cohort.panel.counts)
    np.testing.assert_allclose(got, _brute_schedule(cohort.panel.time, cohort.panel.counts))
    assert 2 <= len(got) <= 6 and got[0] >= 0 and got[-1] <= cohort.panel.time.max() + 2


def test_typical_schedule_refuses_a_single_time():
    with pytest.raises(SettingsError, match="do not span"):
        typical_schedule([3.0, 3.0], [2])


# ----------------------------------------------------------------------------- dropout
def test_dropout_rate_is_the_censored_exponential_mle(demo):
    _, _, dropout = demo
    hz = dropout_hazard(dropout)
    assert hz.available and hz.events == dropout.n_left_early
    s = dropout.subjects
    left = s["left_early"].to_numpy(bool)
    t = np.where(left, s["last_time"], np.minimum(s["potential_followup"], dropout.horizon))
    t = np.clip(t, 0, None)
    # independent: maximise the censored exponential log-likelihood d log λ − λ T numerically
    # (scipy.optimize), not the closed form d / T used by the code
    nll = lambda log_rate: -(left.sum() * log_rate - math.exp(log_rate) * t.sum())
    best = optimize.minimize_scalar(nll, bounds=(-20, 5), method="bounded",
                                    options={"xatol": 1e-10})
    assert hz.rate == pytest.approx(math.exp(best.x), rel=1e-6)


def test_dropout_rate_without_classification_is_zero_and_said():
    class Unclassified:
        classified = False

    hz = dropout_hazard(Unclassified())
    assert hz.rate == 0.0 and not hz.available and "cannot be told apart" in hz.rule


# ----------------------------------------------------------------------------- covariate, model
def test_covariate_is_the_cohorts_log2_median_centred_x(demo):
    cohort, _, _ = demo
    raw = pd.read_csv(DEMO_CSV)
    first = raw.groupby("recipient_id", sort=False)["urine_protein_ratio"].first()
    v = np.log2(first.loc[list(cohort.subject_ids)].to_numpy(float))   # demo: log2, median
    v = v[np.isfinite(v)]
    expected = v - np.median(v)                      # pandas/numpy recomputation from the file
    got = cohort_covariate(cohort)
    np.testing.assert_allclose(np.sort(got), np.sort(expected), rtol=1e-12, atol=1e-12)


def test_default_model_effect_and_plan_match_independent_choices(demo):
    cohort, models, dropout = demo
    made = plan_from_cohort(cohort, models, dropout)
    comp = models.comparison
    ok = comp[comp["converged"].astype(bool)]
    # independent: lowest AIC among converged fits, read from the comparison table (pandas)
    assert made.model == ok.loc[ok["aic"].idxmin(), "model"]
    fit = models.fits[made.model]
    names = list(fit.names) if hasattr(fit, "names") else None
    beta = np.asarray(fit.beta, dtype=float)
    term = models.design.interaction_term
    idx = names.index(term) if names else models.design.names.index(term)
    assert made.inputs.effect == pytest.approx(beta[idx], rel=1e-12)
    # the plan equals plan_study called with the same inputs built by hand
    direct = plan_study(PlanInputs(CovarianceModel.from_fit(fit, made.model), beta[idx],
                                   typical_schedule(cohort.panel.time, cohort.panel.counts),
                                   covariate=cohort_covariate(cohort),
                                   dropout_rate=dropout_hazard(dropout).rate))
    assert made.plan.subjects_needed == direct.subjects_needed
    assert made.plan.power_curve == direct.power_curve
    rows = {r["name"]: r["subjects_needed"] for r in made.comparison.rows}
    assert set(rows) == set(models.fits)


def test_two_groups_default_effect_is_estimate_times_iqr(demo):
    cohort, models, dropout = demo
    made = plan_from_cohort(cohort, models, dropout, design="two-groups")
    est = plan_from_cohort(cohort, models, dropout).inputs.effect
    x = cohort_covariate(cohort)
    iqr = np.percentile(x, 75) - np.percentile(x, 25)          # numpy percentiles
    assert made.inputs.effect == pytest.approx(est * iqr, rel=1e-12)
    assert made.plan.subjects_needed % 2 == 0


def test_given_inputs_replace_defaults_and_bad_ones_are_explained(demo):
    cohort, models, dropout = demo
    made = plan_from_cohort(cohort, models, dropout, model="intercept (REML)", effect=-0.1,
                            schedule=(0, 6, 12), dropout_rate=0.01)
    assert made.sources["effect"] == made.sources["schedule"] == "given"
    assert made.inputs.schedule == (0.0, 6.0, 12.0) and made.inputs.dropout_rate == 0.01
    with pytest.raises(ModelError, match="not one of the fitted models"):
        plan_from_cohort(cohort, models, dropout, model="nope")
    with pytest.raises(SettingsError, match="strictly increasing"):
        plan_from_cohort(cohort, models, dropout, schedule=(0, 12, 6))


def test_parse_schedule():
    assert parse_schedule(" 0, 6;12 , 24") == (0.0, 6.0, 12.0, 24.0)
    assert parse_schedule("  ") is None and parse_schedule(None) is None
    with pytest.raises(SettingsError, match="'six' is not a number"):
        parse_schedule("0, six")
