"""Simulation recovery: data drawn from known parameters give them back (brute-force truth)."""
from __future__ import annotations

import numpy as np
import pytest

from analysis.models.mixed import fit_mixed
from analysis.models.mixed.simulate import simulate_cohort


@pytest.mark.slow
def test_full_model_recovers_generating_parameters():
    # independent truth: the parameters the simulator drew the data from
    s = simulate_cohort(400, seed=2024, visits=(4, 9))
    fit = fit_mixed(s.panel, s.X, names=s.names, structure="intercept+slope+serial")
    assert fit.converged, fit.message
    truth = s.truth
    ff = fit.fixed_frame()
    # fixed effects within 3.5 model-based SEs of the truth
    z = (ff["estimate"].to_numpy() - truth["beta"]) / ff["se"].to_numpy()
    assert np.all(np.abs(z) < 3.5), z
    # variance parameters: within their 99.9%-ish Wald interval widened by 50%, and the
    # point estimates within a loose relative band (common practice for recovery checks)
    for k in ("intercept_var", "slope_var", "serial_var", "range", "error_var"):
        np.testing.assert_allclose(fit.variance[k], truth[k], rtol=0.5, err_msg=k)
        lo, hi = fit.variance_ci[k]
        assert lo / 1.5 < truth[k] < hi * 1.5, (k, lo, truth[k], hi)
    np.testing.assert_allclose(fit.variance["intercept_slope_cov"], truth["intercept_slope_cov"],
                               atol=0.5 * np.sqrt(truth["intercept_var"] * truth["slope_var"]))
    assert fit.boundary == ()


def test_boundary_is_flagged_when_a_component_is_absent():
    # simulated with no random slope (slope_var = 0) and no serial process: the fitted
    # slope variance must go to the boundary and be reported, not hidden
    s = simulate_cohort(200, seed=7, slope_var=0.0, intercept_slope_cov=0.0, serial_var=0.0)
    fit = fit_mixed(s.panel, s.X, names=s.names, structure="intercept+slope")
    assert any("slope" in n for n in fit.boundary), fit.boundary
    # brute-force comparison: the nested random-intercept fit; its likelihood can be no
    # higher, and with no true slope variance the gain is small (LR < 3.84, common practice)
    ri = fit_mixed(s.panel, s.X, names=s.names, structure="intercept")
    lr = 2 * (fit.loglik - ri.loglik)
    assert -1e-6 <= lr < 3.84, lr
    frame = fit.variance_frame()
    assert frame["note"].str.len().gt(0).any()
