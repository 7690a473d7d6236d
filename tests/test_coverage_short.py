"""Short version of validation/coverage.py (20 replications)."""
from __future__ import annotations

import importlib.util
from pathlib import Path

import numpy as np
import pytest
from scipy import stats

_PATH = Path(__file__).resolve().parents[1] / "validation" / "coverage.py"


def _load():
    spec = importlib.util.spec_from_file_location("coverage_study", _PATH)
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    return mod


@pytest.mark.slow
def test_short_coverage_within_binomial_band():
    reps = 20
    out = _load().run_coverage(reps, subjects=150, seed=500)
    # Loose band: with true coverage 0.95, a count below the 0.1% quantile of
    # Binomial(20, 0.95) (reference: scipy.stats.binom) would signal broken intervals.
    lowest = stats.binom.ppf(0.001, reps, 0.95) / reps
    assert out["model_coverage"] >= lowest, out
    assert out["robust_coverage"] >= lowest, out
    assert out["n_not_converged"] == 0
    # the simulator's truth is what the intervals are judged against
    from analysis.mixed.simulate import simulate_cohort
    np.testing.assert_allclose(out["truth"], simulate_cohort(3, seed=0).truth["beta"][3],
                               rtol=0, atol=0)
    # model SE close to the empirical SD of the estimates (brute-force Monte-Carlo check)
    np.testing.assert_allclose(out["mean_se"], out["empirical_sd"], rtol=0.5)
