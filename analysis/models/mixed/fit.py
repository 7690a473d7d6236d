"""Fit a linear mixed model with a chosen working covariance structure.

Fixed effects are profiled out (generalised least squares for each θ);
the variance parameters are optimised on an unconstrained scale with
L-BFGS-B and the analytic gradient of :mod:`analysis.models.mixed.likelihood`.
Structures without a serial process are evaluated from per-subject sums
(no n×n matrices); the others from dense per-visit-count stacks.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import linalg as sla
from scipy import optimize

from ...confidence import z_quantile
from ...errors import ModelError
from .likelihood import (NotPositiveDefinite, bias_reduced_scores, build_groups, build_sums,
                         evaluate)
from .results import FitInternals, MixedFit
from .structures import (CORRELATIONS, METHODS, PARAMETER_ORDER, components, natural_from_theta,
                         spec_for, theta_from_natural)

#: Largest move (on the log scale) of a log-variance away from its start value.
_LOG_BOUND = 18.0
#: L-BFGS-B's projected-gradient tolerance on the per-observation objective −ℓ/N. Near the
#: optimum ℓ is only resolved to rounding (~1e-15 relative), so the line search cannot make
#: progress much below this; the Newton polish (analytic gradient) finishes the job.
_GTOL = 1e-7


# ----------------------------------------------------------------------------- validation
def _check_inputs(panel, X, names, spec, method, correlation, maxiter):
    if method not in METHODS:
        raise ModelError(f"method {method!r} is not known; choose one of {list(METHODS)}")
    if correlation not in CORRELATIONS:
        raise ModelError(f"correlation {correlation!r} is not known; choose one of {list(CORRELATIONS)}")
    if int(maxiter) < 1:
        raise ModelError(f"maxiter == {maxiter}, must be >= 1")
    X = np.asarray(X, dtype=float)
    if X.ndim == 1:
        X = X[:, None]
    if X.ndim != 2:
        raise ModelError(f"design matrix must be 2-D (rows x terms), got {X.ndim} dimensions")
    if X.shape[0] != panel.n_obs:
        raise ModelError(f"design matrix has {X.shape[0]} rows but the panel has {panel.n_obs} "
                         "visits; build X in panel row order")
    names = tuple(str(n) for n in names)
    if len(names) != X.shape[1]:
        raise ModelError(f"{len(names)} term names given for {X.shape[1]} design columns")
    if len(set(names)) != len(names):
        dup = sorted({n for n in names if names.count(n) > 1})
        raise ModelError(f"term names must be distinct; repeated: {dup}")
    if X.shape[1] == 0:
        raise ModelError("design matrix has no columns; include at least an intercept")
    bad_y = np.flatnonzero(~np.isfinite(panel.y))
    if bad_y.size:
        raise ModelError(f"response is missing or not finite at {bad_y.size} panel row(s) "
                         f"(first: {bad_y[:5].tolist()}); drop or impute them before fitting")
    bad = ~np.isfinite(X)
    if bad.any():
        cols = [names[j] for j in np.flatnonzero(bad.any(axis=0))]
        rows = np.flatnonzero(bad.any(axis=1))
        raise ModelError(f"design column(s) {cols} have missing or non-finite values at "
                         f"{rows.size} panel row(s) (first: {rows[:5].tolist()})")
    const = np.ptp(X, axis=0) == 0
    intercepts = [j for j in np.flatnonzero(const) if X[0, j] != 0]
    for j in np.flatnonzero(const):
        if X[0, j] == 0 or (len(intercepts) > 1 and j != intercepts[0]):
            raise ModelError(f"design column {names[j]!r} has no variation (every row is "
                             f"{X[0, j]:g}); remove it or check the covariate")
    _check_rank(X, names)
    problem = response_variation_problem(panel.y, X)
    if problem:
        raise ModelError(problem)
    m = panel.n_subjects
    if m < spec.min_subjects:
        raise ModelError(f"structure {spec.name!r} needs at least {spec.min_subjects} subjects "
                         f"(2 per random effect + 1); the data have {m}")
    if (spec.n_random >= 1 or spec.serial) and panel.counts.max() < 2:
        raise ModelError(f"structure {spec.name!r} needs at least one subject with 2 or more "
                         "visits; every subject has a single visit")
    if spec.n_random == 2:
        tmin = np.minimum.reduceat(panel.time, panel.starts)
        tmax = np.maximum.reduceat(panel.time, panel.starts)
        if not np.any(tmax > tmin):
            raise ModelError("a random slope needs at least one subject with 2 or more distinct "
                             "visit times; no subject has")
    return X, names


def response_variation_problem(y, X, *, response: str = "response") -> str | None:
    """Why ``y`` leaves nothing for a covariance model to describe, or None.

    Two refusals: every value of the response is the same, or the OLS fit of
    the mean-model design reproduces it exactly (residual sum of squares below
    1e-20 of the total sum of squares about the mean, i.e. rounding error).
    Either way a likelihood fit would drive every variance to 0 and report
    meaningless "converged" results.
    """
    y = np.asarray(y, dtype=float)
    if y.size == 0:
        return None
    dev = y - y.mean()
    tss = float(dev @ dev)
    if tss <= (1e-12 * max(abs(float(y.mean())), 1e-300))**2 * y.size:
        return (f"{response} has no variation: every value is {y[0]:g}; a model of change over "
                "time needs a response that varies")
    X = np.asarray(X, dtype=float)
    if X.ndim == 1:
        X = X[:, None]
    beta = np.linalg.lstsq(X, y, rcond=None)[0]
    r = y - X @ beta
    if float(r @ r) <= 1e-20 * tss:
        return (f"the mean model reproduces {response} exactly (no residual variation left "
                "after the fixed effects): there is nothing for a covariance model to describe; "
                "check that the response is not computed from the time or covariate columns")
    return None


def _check_rank(X, names):
    scale = np.sqrt((X**2).sum(axis=0))
    Xs = X / np.where(scale > 0, scale, 1.0)
    _, R, piv = sla.qr(Xs, mode="economic", pivoting=True)
    d = np.abs(np.diag(R))
    tol = max(X.shape) * np.finfo(float).eps * 1e3 * (d[0] if d.size else 1.0)
    rank = int((d > tol).sum())
    if rank < X.shape[1]:
        dep = [names[j] for j in piv[rank:]]
        raise ModelError(f"design matrix is singular (rank {rank} of {X.shape[1]}): column(s) "
                         f"{dep} are linear combinations of the other columns; remove them")


# ----------------------------------------------------------------------------- start values
def _start_natural(panel, X, spec, time_scale):
    """Moment-based starting values (internal time scale), from OLS residuals.

    Notes
    -----
    With OLS residuals r, subject means r̄_i and pooled within-subject
    variance w: between-subject variance max(var(r̄_i) − w·mean(1/n_i), 0.1·s²);
    slope variance from per-subject least-squares slopes of r on t, less their
    sampling variance w/S_tt; serial models split w equally between σ² and τ²;
    the range starts at half the median follow-up span.
    """
    beta, *_ = np.linalg.lstsq(X, panel.y, rcond=None)
    r = panel.y - X @ beta
    n, p = X.shape
    s2 = max(float(r @ r) / max(n - p, 1), 1e-12)
    cnt = panel.counts.astype(float)
    rbar = np.add.reduceat(r, panel.starts) / cnt
    dev = r - rbar[panel.codes]
    dfw = float((cnt - 1).sum())
    w = float(dev @ dev) / dfw if dfw > 0 else s2
    w = max(w, 0.05 * s2)
    between = max(float(np.var(rbar)) - w * float(np.mean(1.0 / cnt)), 0.1 * s2)
    t = panel.time / time_scale
    tbar = np.add.reduceat(t, panel.starts) / cnt
    tc = t - tbar[panel.codes]
    stt = np.add.reduceat(tc * tc, panel.starts)
    str_ = np.add.reduceat(tc * r, panel.starts)
    nat = {}
    if spec.n_random >= 1:
        nat["intercept_var"] = between
    if spec.n_random == 2:
        ok = stt > 1e-8 * max(stt.max(), 1e-300)
        slopes = str_[ok] / stt[ok]
        v1 = float(np.var(slopes)) - w * float(np.mean(1.0 / stt[ok])) if slopes.size > 1 else 0.0
        nat["slope_var"] = max(v1, 0.05 * between)
        nat["intercept_slope_cov"] = 0.0
    if spec.serial:
        span = (np.maximum.reduceat(t, panel.starts) - np.minimum.reduceat(t, panel.starts))
        span = span[span > 0]
        nat["serial_var"] = 0.5 * w if spec.n_random else max(0.5 * w + between, 0.5 * w)
        nat["range"] = 0.5 * float(np.median(span)) if span.size else 1.0
        nat["error_var"] = 0.5 * w
    else:
        nat["error_var"] = w
    # internal scale -> user scale for the converter
    user = dict(nat)
    if "slope_var" in user:
        user["slope_var"] = nat["slope_var"] / time_scale**2
        user["intercept_slope_cov"] = 0.0
    if "range" in user:
        user["range"] = nat["range"] * time_scale
    return user


# ----------------------------------------------------------------------------- optimisation
def _bounds(spec, theta0):
    """Box for L-BFGS-B: log-scale entries within ±18 of start, off-diagonal free."""
    b = []
    for k in range(spec.n_theta):
        if spec.n_random == 2 and k == 1:
            b.append((None, None))
        else:
            b.append((theta0[k] - _LOG_BOUND, theta0[k] + _LOG_BOUND))
    return b


def _optimise(groups, spec, theta0, correlation, method, maxiter, n_obs):
    scale = 1.0 / n_obs
    state = {"best": None}

    def fun(th):
        try:
            ev = evaluate(groups, spec, th, correlation=correlation, method=method)
        except NotPositiveDefinite:
            return 1e300, np.zeros_like(th)
        if state["best"] is None or ev.loglik > state["best"][0]:
            state["best"] = (ev.loglik, th.copy())
        return -ev.loglik * scale, -ev.grad * scale

    # L-BFGS-B, restarted (fresh curvature memory) while the gradient is not yet small:
    # a wild trial step into a near-singular region can end a run early. A restart that
    # leaves the best point where it was ends the loop: the next one would start from
    # the same θ and repeat the same (deterministic) run.
    theta, nit, res = theta0, 0, None
    bounds = _bounds(spec, theta0)
    for _ in range(6):
        res = optimize.minimize(fun, theta, jac=True, method="L-BFGS-B", bounds=bounds,
                                options={"maxiter": max(int(maxiter) - nit, 1), "ftol": 1e-15,
                                         "gtol": _GTOL, "maxcor": 20})
        nit += int(res.nit)
        moved = np.max(np.abs(res.x - theta)) if res.nit else 0.0
        start, theta = theta, state["best"][1] if state["best"] is not None else res.x
        if np.array_equal(theta, start):
            break
        g = np.max(np.abs(_projected_gradient(fun(theta)[1], theta, bounds)))
        if g <= _GTOL or g / scale < 1e-4 or nit >= maxiter or moved < 1e-10:
            break
    res.x = theta
    theta, H = _polish(fun, res.x)
    grad_norm = float(np.max(np.abs(_projected_gradient(fun(theta)[1], theta, bounds)))) / scale
    # converged: the projected gradient of ℓ (per unit log-parameter) is negligible
    converged = grad_norm < 1e-2
    return theta, converged, nit, str(res.message), grad_norm, None if H is None else H / scale


def _projected_gradient(g, theta, bounds):
    """Gradient with components pushing out of an active bound set to zero."""
    g = np.array(g, dtype=float)
    for k, (lo, hi) in enumerate(bounds):
        if lo is not None and theta[k] <= lo + 1e-12 and g[k] > 0:
            g[k] = 0.0
        if hi is not None and theta[k] >= hi - 1e-12 and g[k] < 0:
            g[k] = 0.0
    return g


def _polish(fun, theta, steps=4):
    """Newton steps with one finite-difference Hessian of the analytic gradient.

    Returns the polished θ and the Hessian of the scaled objective (or None when
    it is not positive definite, e.g. at a boundary, in which case θ is kept).
    Each step is accepted only if the objective does not increase.
    """
    f0, g0 = fun(theta)
    H = _fd_jacobian(lambda t: fun(t)[1], theta, 1e-5)
    H = 0.5 * (H + H.T)
    try:
        if np.linalg.eigvalsh(H).min() <= 0:
            return theta, H
        Hinv = np.linalg.inv(H)
    except np.linalg.LinAlgError:
        return theta, None
    for _ in range(steps):
        step = -Hinv @ g0
        if np.max(np.abs(step)) > 1.0 or np.max(np.abs(step)) < 1e-12:
            break
        f1, g1 = fun(theta + step)
        if not f1 <= f0 + 1e-15 * abs(f0):
            break
        theta, f0, g0 = theta + step, f1, g1
    return theta, H


def _fd_jacobian(f, x, h):
    x = np.asarray(x, dtype=float)
    cols = []
    for k in range(x.size):
        e = np.zeros_like(x)
        e[k] = h * max(1.0, abs(x[k]))
        cols.append((np.asarray(f(x + e)) - np.asarray(f(x - e))) / (2 * e[k]))
    return np.column_stack(cols)


# ----------------------------------------------------------------------------- reporting scale
def _eta_from_natural(spec, nat):
    """Reporting scale for Wald intervals: log of variances/range, raw covariance."""
    return np.array([nat[k] if k == "intercept_slope_cov" else np.log(nat[k])
                     for k in spec.parameters])


def _natural_from_eta(spec, eta):
    return {k: (float(v) if k == "intercept_slope_cov" else float(np.exp(v)))
            for k, v in zip(spec.parameters, eta)}


def _interior_covariance(H_theta, interior):
    """Inverse of the observed information of θ restricted to the interior entries.

    Parameters at the boundary are held at their estimates: the information
    sub-block of the remaining (interior) entries of θ is inverted, so one
    variance at 0 does not make the intervals of the others undefined.
    Returns a (k, k) matrix with zeros outside the interior block, or None
    when the sub-block is not positive definite.
    """
    k = len(interior)
    idx = np.flatnonzero(interior)
    if H_theta is None or idx.size == 0:
        return None if idx.size else np.zeros((k, k))
    sub = np.asarray(H_theta, dtype=float)[np.ix_(idx, idx)]
    sub = 0.5 * (sub + sub.T)
    try:
        if not np.all(np.isfinite(sub)) or np.linalg.eigvalsh(sub).min() <= 0:
            return None
        inv = np.linalg.inv(sub)
    except np.linalg.LinAlgError:
        return None
    out = np.zeros((k, k))
    out[np.ix_(idx, idx)] = 0.5 * (inv + inv.T)
    return out


def _variance_intervals(spec, theta, cov_theta, time_scale, at_boundary):
    """Wald 95% intervals of the interior variance parameters, on the reporting scale η.

    η = (log variances, log range, raw intercept–slope covariance). With
    K = ∂η/∂θ (central differences of the parameter map θ → η, defined
    everywhere) the covariance of η̂ is K·C·Kᵀ, where C is
    :func:`_interior_covariance` (inverse observed information of the
    interior entries of θ; the finite-difference Hessian of −ℓ from the
    analytic gradient). Intervals are exp(η̂ ± 1.96·se) for log-scale entries
    and η̂ ± 1.96·se for the covariance. A parameter at the boundary gets the
    one-sided interval [0, NaN) for a variance (its lower limit is the
    boundary itself; the Wald upper limit is not valid there) and (NaN, NaN)
    otherwise; NaN also when the interior information is not positive definite.
    """
    nat = natural_from_theta(spec, theta, time_scale)
    eta0 = _eta_from_natural(spec, nat)
    se = np.full(eta0.size, np.nan)
    if cov_theta is not None:
        with np.errstate(divide="ignore", invalid="ignore"):
            K = _fd_jacobian(lambda th: _eta_from_natural(
                spec, natural_from_theta(spec, th, time_scale)), theta, 1e-6)
            d = np.diag(K @ cov_theta @ K.T)
        se = np.sqrt(np.where(np.isfinite(d) & (d > 0), d, np.nan))
    ci = {}
    with np.errstate(over="ignore", invalid="ignore"):
        for k, e, s in zip(spec.parameters, eta0, se):
            if k in at_boundary:
                ci[k] = (np.nan, np.nan) if k in ("intercept_slope_cov", "range") else \
                    (0.0, np.nan)
                continue
            lo, hi = e - z_quantile() * s, e + z_quantile() * s
            ci[k] = (float(lo), float(hi)) if k == "intercept_slope_cov" else \
                (float(np.exp(lo)), float(np.exp(hi)))
    return ci


def _satterthwaite_df(data, spec, theta, correlation, method, cov_theta, cov_beta, h=1e-4):
    """Satterthwaite degrees of freedom of each fixed effect's Wald statistic.

    df_j = 2·Φ_jj² / (g_jᵀ C g_j), with Φ(θ) = (Σ XᵢᵀVᵢ(θ)⁻¹Xᵢ)⁻¹ the
    profiled fixed-effect covariance, g_j = ∂Φ_jj/∂θ by central differences
    over the interior entries of θ (each a batched evaluation of the
    likelihood machinery: per-subject sums or per-visit-count stacks), and C
    the inverse observed information of θ (REML or ML, whichever was
    maximised) restricted to the interior entries. The value is invariant
    to the parameterisation of θ. NaN when C is unavailable.

    References
    ----------
    Satterthwaite (1946), Biometrics Bulletin 2, 110–114; Giesbrecht & Burns (1985),
    Biometrics 41, 477–486; Fai & Cornelius (1996), J. Stat. Comput. Simul. 54, 363–378.
    """
    p = cov_beta.shape[0]
    if cov_theta is None:
        return np.full(p, np.nan)
    idx = np.flatnonzero(np.any(cov_theta != 0, axis=0))
    grads = np.zeros((theta.size, p))
    for k in idx:
        e = np.zeros_like(theta)
        e[k] = h
        diag = []
        for sign in (1.0, -1.0):
            ev = evaluate(data, spec, theta + sign * e, correlation=correlation, method=method,
                          gradient=False)
            diag.append(np.diag(np.linalg.inv(ev.M)))
        grads[k] = (diag[0] - diag[1]) / (2 * h)
    var_phi = np.einsum("kj,kl,lj->j", grads, cov_theta, grads)
    phi = np.diag(cov_beta)
    with np.errstate(divide="ignore", invalid="ignore"):
        df = 2.0 * phi**2 / var_phi
    # a variance of Φ_jj that is numerically zero means the parameters barely move it: very large df
    return np.where(np.isfinite(df) & (df > 0), df, np.where(var_phi <= 0, np.inf, np.nan))


@dataclass(frozen=True)
class Boundary:
    """Which variance parameters sit at (or near) the edge of the parameter space.

    Attributes
    ----------
    notes : tuple of str
        Plain-language notes, each starting with the parameter concerned.
    at_boundary : frozenset of str
        Natural parameters at the boundary, or not identified because of one
        that is (the range when the serial variance is 0; the intercept–slope
        covariance when a random-effect variance is 0 or their correlation ±1).
    interior : ndarray of bool (k,)
        Entries of θ kept when the information is inverted (the others are held
        at their estimates).
    """

    notes: tuple
    at_boundary: frozenset
    interior: np.ndarray


def _theta_names(spec):
    """Natural parameter each θ entry mainly drives (log-Cholesky: l10 → the covariance)."""
    if spec.n_random == 2:
        names = ["intercept_var", "intercept_slope_cov", "slope_var"]
        return tuple(names + list(spec.parameters[3:]))
    return spec.parameters


def _boundary(spec, theta, theta0, panel, time_scale) -> Boundary:
    """Notes on estimates at or near the edge of the parameter space, and the interior θ entries."""
    comp = components(spec, theta)
    notes, at = [], set()
    keep = np.ones(spec.n_theta, dtype=bool)
    G = comp.G
    total = comp.error_var + comp.serial_var + (G[0, 0] if G.size else 0.0)
    rel = 1e-6
    k_serial = 3 if spec.n_random == 2 else spec.n_random
    if G.size and G[0, 0] < rel * total:
        notes.append("intercept_var is at or near 0 (boundary): little between-subject "
                     "variation in level beyond the other components")
        at.add("intercept_var")
        keep[0] = False
        if spec.n_random == 2:
            at.add("intercept_slope_cov")
    if spec.n_random == 2:
        if G[1, 1] < rel * total:
            notes.append("slope_var is at or near 0 (boundary): little between-subject "
                         "variation in rate of change")
            at.update(("slope_var", "intercept_slope_cov"))
            keep[1:3] = False
        else:
            corr = G[1, 0] / np.sqrt(G[0, 0] * G[1, 1]) if G[0, 0] > 0 else 0.0
            if abs(corr) > 0.99:
                notes.append(f"intercept_slope_cov: the intercept–slope correlation is "
                             f"{corr:.3f}, at or near ±1 (boundary): G is close to singular")
                at.add("intercept_slope_cov")
                keep[2] = False
    if spec.serial:
        if comp.serial_var < rel * total:
            notes.append("serial_var is at or near 0 (boundary): no serial correlation detected")
            notes.append("range is not identified while serial_var is 0")
            at.update(("serial_var", "range"))
            keep[k_serial:k_serial + 2] = False
        t = panel.time / time_scale
        lags = np.diff(t)[np.diff(panel.codes) == 0]
        lags = lags[lags > 0]
        min_lag = float(lags.min()) if lags.size else 1.0
        span = float(t.max() - t.min()) if t.size else 1.0
        if comp.range < 1e-2 * min_lag:
            notes.append("range is near 0 (boundary): serial correlation has died out before "
                         "the shortest lag, so it is confounded with measurement error")
            at.update(("range", "serial_var"))
            keep[k_serial:k_serial + 2] = False
        elif comp.range > 100 * max(span, 1e-12):
            notes.append("range is very large (boundary): the serial process is nearly "
                         "constant within subjects, like a random intercept")
            at.add("range")
            keep[k_serial + 1] = False
    if comp.error_var < rel * total:
        notes.append("error_var is at or near 0 (boundary): no measurement error beyond "
                     "the other components")
        at.add("error_var")
        keep[-1] = False
    hit = np.abs(theta - theta0) >= _LOG_BOUND - 1e-6
    if spec.n_random == 2:
        hit[1] = False
    names = _theta_names(spec)
    for k in np.flatnonzero(hit):
        notes.append(f"the optimiser stopped at its search limit for {names[k]}")
        at.add(names[k])
        keep[k] = False
    return Boundary(tuple(notes), frozenset(at), keep)


# ----------------------------------------------------------------------------- public
def fit_mixed(panel, X, *, names, structure: str = "intercept+slope",
              correlation: str = "exponential", method: str = "reml", start: dict | None = None,
              maxiter: int = 500) -> MixedFit:
    """Fit y = Xβ + Zb + W + ε by REML or ML with a chosen working covariance.

    Parameters
    ----------
    panel : analysis.preparation.panel.Panel
        Response ``y``, ``time`` and subject grouping (rows sorted by subject, time).
    X : ndarray (n_obs, p)
        Fixed-effects design in panel row order.
    names : sequence of str
        The p term names.
    structure : str
        One of :data:`analysis.models.mixed.STRUCTURES`.
    correlation : str
        Serial correlation function (one of :data:`analysis.models.mixed.CORRELATIONS`), used by
        structures with a serial process whose table row leaves the shape to the user.
    method : {"reml", "ml"}
    start : dict, optional
        Starting natural parameters (keys as in ``MixedFit.variance``); missing keys
        take the moment-based defaults.
    maxiter : int
        Iteration limit of the quasi-Newton optimiser.

    Returns
    -------
    MixedFit

    Notes
    -----
    Model: y_ij = x_ijᵀβ + z_ijᵀb_i + W_i(t_ij) + ε_ij, b_i ~ N(0, G),
    W_i stationary with variance σ² and correlation ρ(u), ε_ij ~ N(0, τ²).
    Log-likelihood convention as statsmodels ``MixedLM`` (REML omits
    ½ log|XᵀX|); see :mod:`analysis.models.mixed.likelihood`. Time is divided by
    its largest absolute value internally; all results are on the user's
    time scale.

    References
    ----------
    Diggle, Heagerty, Liang & Zeger (2002), Analysis of Longitudinal Data, ch. 5.
    Verbeke & Molenberghs (2000), Linear Mixed Models for Longitudinal Data, ch. 5–6.
    """
    spec = spec_for(structure)
    X, names = _check_inputs(panel, X, names, spec, method, correlation, maxiter)
    correlation = spec.correlation_for(correlation) or correlation   # a structure may fix it
    tmax = float(np.max(np.abs(panel.time))) if panel.n_obs else 1.0
    time_scale = tmax if tmax > 0 else 1.0
    if spec.serial:
        data = build_groups(panel, X, spec, time_scale)
    else:
        data = build_sums(panel, X, spec, time_scale)
    nat0 = _start_natural(panel, X, spec, time_scale)
    if start:
        unknown = set(start) - set(spec.parameters)
        if unknown:
            raise ModelError(f"start value(s) {sorted(unknown)} do not belong to structure "
                             f"{structure!r}; its parameters are {list(spec.parameters)}")
        for k, v in start.items():
            if k != "intercept_slope_cov" and not (np.isfinite(v) and v > 0):
                raise ModelError(f"start value {k} == {v}, must be > 0")
        nat0.update({k: float(v) for k, v in start.items()})
    theta0 = theta_from_natural(spec, nat0, time_scale)
    theta, converged, nit, message, gnorm, H = _optimise(data, spec, theta0, correlation, method,
                                                      maxiter, panel.n_obs)
    ev = evaluate(data, spec, theta, correlation=correlation, method=method, gradient=False)
    natural = natural_from_theta(spec, theta, time_scale)
    variance = {k: natural[k] for k in PARAMETER_ORDER if k in natural}
    bnd = _boundary(spec, theta, theta0, panel, time_scale)
    cov_theta = _interior_covariance(H, bnd.interior)
    ci = _variance_intervals(spec, theta, cov_theta, time_scale, bnd.at_boundary)
    variance_ci = {k: ci[k] for k in variance}
    cov_beta = np.linalg.inv(ev.M)
    cov_beta = 0.5 * (cov_beta + cov_beta.T)
    df = _satterthwaite_df(data, spec, theta, correlation, method, cov_theta, cov_beta)
    internals = FitInternals(panel=panel, X=X, spec=spec, theta=theta, time_scale=time_scale,
                             data=data)
    u = bias_reduced_scores(internals.groups, spec, theta, ev.beta, cov_beta, correlation)
    robust = cov_beta @ (u.T @ u) @ cov_beta
    robust = 0.5 * (robust + robust.T)
    n_params = X.shape[1] + spec.n_theta
    notes = bnd.notes
    if not converged:
        message = f"did not converge: {message} (largest gradient entry {gnorm:.2g})"
    return MixedFit(
        structure=structure,
        correlation=correlation if spec.serial else None,
        method=method,
        names=names,
        beta=ev.beta.copy(),
        cov_beta=cov_beta,
        robust_cov_beta=robust,
        variance=variance,
        variance_ci=variance_ci,
        loglik=ev.loglik,
        n_params=n_params,
        aic=-2.0 * ev.loglik + 2.0 * n_params,
        bic=-2.0 * ev.loglik + np.log(panel.n_subjects) * n_params,
        converged=converged,
        iterations=nit,
        boundary=notes,
        at_boundary=tuple(k for k in variance if k in bnd.at_boundary),
        df=df,
        robust_df=float(max(panel.n_subjects - X.shape[1], 1)),
        n_subjects=panel.n_subjects,
        n_obs=panel.n_obs,
        message=message,
        internals=internals,
    )
