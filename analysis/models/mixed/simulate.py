"""Draw simulated cohorts from a known mixed model (tests, benchmarks, coverage studies)."""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ...preparation.panel import Panel
from .structures import correlation_function


@dataclass(frozen=True, eq=False)
class SimulatedCohort:
    """A simulated cohort and the design of its true mean model.

    Attributes
    ----------
    panel : Panel
        Response, time (0 to ``follow_up``) and subject grouping.
    X : ndarray (n_obs, 4)
        Design in panel row order: intercept, time, covariate, time × covariate.
    names : tuple of str
        ("intercept", "time", "x", "time:x").
    covariate : ndarray (n_subjects,)
        The standard-normal baseline covariate per subject.
    truth : dict
        beta (4,), intercept_var, slope_var, intercept_slope_cov, serial_var,
        range, error_var, correlation.
    """

    panel: Panel
    X: np.ndarray
    names: tuple
    covariate: np.ndarray
    truth: dict


def simulate_cohort(n_subjects: int, *, seed: int = 0, visits: tuple[int, int] = (3, 9),
                    follow_up: float = 60.0, beta=(55.0, -0.10, -3.0, -0.04),
                    intercept_var: float = 144.0, slope_var: float = 0.04,
                    intercept_slope_cov: float = -0.48, serial_var: float = 25.0,
                    range: float = 12.0, error_var: float = 16.0,
                    correlation: str = "exponential") -> SimulatedCohort:
    """Simulate y_ij = x_ijᵀβ + b0_i + b1_i t_ij + W_i(t_ij) + ε_ij.

    Parameters
    ----------
    n_subjects : int
    seed : int
    visits : (int, int)
        Each subject's visit count is uniform on this inclusive range.
    follow_up : float
        Visit times are sorted uniform draws on [0, follow_up].
    beta : 4 floats
        intercept, time slope, covariate effect, time × covariate.
    intercept_var, slope_var, intercept_slope_cov : float
        G (set variances to 0 to omit a random effect).
    serial_var, range, error_var : float
        σ², φ and τ² (serial_var 0 omits the serial process).
    correlation : {"exponential", "gaussian"}

    Returns
    -------
    SimulatedCohort

    Notes
    -----
    Subjects are grouped by visit count and each group's covariance stack is
    factorised at once, so simulation is vectorised over subjects.
    """
    rng = np.random.default_rng(seed)
    lo, hi = visits
    counts = rng.integers(lo, hi + 1, size=n_subjects)
    x = rng.standard_normal(n_subjects)
    G = np.array([[intercept_var, intercept_slope_cov], [intercept_slope_cov, slope_var]])
    b = np.zeros((n_subjects, 2))
    if intercept_var > 0 or slope_var > 0:
        if slope_var > 0:
            b = rng.multivariate_normal(np.zeros(2), G, size=n_subjects)
        else:
            b[:, 0] = rng.normal(0.0, np.sqrt(intercept_var), size=n_subjects)
    codes_all, t_all, y_all = [], [], []
    beta = np.asarray(beta, dtype=float)
    for n in np.unique(counts):
        subj = np.flatnonzero(counts == n)
        m = subj.size
        t = np.sort(rng.uniform(0.0, follow_up, size=(m, n)), axis=1)
        noise = rng.normal(0.0, np.sqrt(error_var), size=(m, n))
        if serial_var > 0:
            lag = np.abs(t[:, :, None] - t[:, None, :])
            R = serial_var * correlation_function(lag, range, correlation)
            R[:, np.arange(n), np.arange(n)] += 1e-10 * serial_var
            L = np.linalg.cholesky(R)
            noise += np.einsum("mij,mj->mi", L, rng.standard_normal((m, n)))
        xs = x[subj][:, None]
        mean = beta[0] + beta[1] * t + beta[2] * xs + beta[3] * t * xs
        y = mean + b[subj, 0][:, None] + b[subj, 1][:, None] * t + noise
        codes_all.append(np.repeat(subj, n))
        t_all.append(t.ravel())
        y_all.append(y.ravel())
    panel = Panel.from_codes(np.concatenate(codes_all), np.concatenate(t_all),
                             np.concatenate(y_all))
    xr = x[panel.codes]
    X = np.column_stack([np.ones(panel.n_obs), panel.time, xr, panel.time * xr])
    truth = dict(beta=beta, intercept_var=intercept_var, slope_var=slope_var,
                 intercept_slope_cov=intercept_slope_cov, serial_var=serial_var, range=range,
                 error_var=error_var, correlation=correlation)
    return SimulatedCohort(panel, X, ("intercept", "time", "x", "time:x"), x, truth)
