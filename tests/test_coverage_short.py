"""Short version of validation/coverage.py, with the power to detect 85% coverage."""
from __future__ import annotations

import importlib.util
from pathlib import Path

import numpy as np
import pytest
from scipy import stats

_PATH = Path(__file__).resolve().parents[1] / "validation" / "coverage.py"

#: Replications and cohort size of the short run (about 35 s on one free core).
REPS, SUBJECTS = 135, 40


def _load():
    spec = importlib.util.spec_from_file_location("coverage_study", _PATH)
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    return mod


def _threshold(reps: int) -> int:
    """Fewest hits that pass: the largest k with P(Binomial(reps, 0.95) < k) <= 0.01."""
    k = np.arange(reps + 1)
    return int(k[stats.binom.cdf(k - 1, reps, 0.95) <= 0.01].max())


def test_threshold_has_the_power_to_fail_at_85_percent():
    # Binomial calculation (reference: scipy.stats.binom): with 135 replications the test
    # fails when fewer than k = 122 intervals (90.4%) cover. A correct 95% interval fails
    # with probability P(Bin(135, 0.95) <= 121) ≈ 0.008; a true 85% coverage passes with
    # probability P(Bin(135, 0.85) >= 122) ≈ 0.046, so it is caught with probability ≥ 0.95.
    k = _threshold(REPS)
    assert stats.binom.cdf(k - 1, REPS, 0.95) <= 0.01
    assert stats.binom.sf(k - 1, REPS, 0.85) <= 0.05


@pytest.mark.slow
def test_short_coverage_of_model_based_and_robust_intervals():
    out = _load().run_coverage(REPS, subjects=SUBJECTS, seed=500)
    assert out["reps"] == REPS and out["n_not_converged"] == 0
    lowest = _threshold(REPS) / REPS
    assert out["model_coverage"] >= lowest, out
    assert out["robust_coverage"] >= lowest, out
    # the simulator's truth is what the intervals are judged against
    from analysis.models.mixed.simulate import simulate_cohort
    np.testing.assert_allclose(out["truth"], simulate_cohort(3, seed=0).truth["beta"][3],
                               rtol=0, atol=0)
    # model SE close to the empirical SD of the estimates (brute-force Monte-Carlo check;
    # the SD of an SD estimate from 135 draws is about 6%)
    np.testing.assert_allclose(out["mean_se"], out["empirical_sd"], rtol=0.25)
