"""Pooled mean-over-time models whose residuals feed the semivariogram and lag correlations.

The residual ``y - fitted`` removes the population mean trend, so that what is
left describes the within-subject dependence (random effects, serial
correlation, measurement error) rather than the average trajectory.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd
from statsmodels.nonparametric.smoothers_lowess import lowess as _sm_lowess

from .. import options as opt
from ..errors import DataError, SettingsError
from ..settings import check_choice, check_value
from ..preparation.panel import Panel
from ..splines import natural_spline_basis, spline_knots

#: points per group in the drawn mean curve
CURVE_POINTS = 100
#: lowess skips refitting within this fraction of the time range (then interpolates linearly)
LOWESS_DELTA_FRACTION = 0.01


@dataclass(frozen=True, eq=False)
class Detrended:
    """Fitted mean trend and residuals.

    Attributes
    ----------
    fitted : float array (n_obs,)
        Mean model value at each row, in panel row order.
    residual : float array (n_obs,)
        ``y - fitted``, in panel row order (``panel.with_y(residual)`` gives
        the residual panel).
    curve : DataFrame
        Columns group, time, fitted: the mean curve on an even grid of
        ``CURVE_POINTS`` times per group, for drawing. Group -1 is the
        pooled curve (always present); groups 0..k-1 appear when the fit was
        made per group.
    description : str
        One sentence describing the mean model, for captions and reports.
    method : str
        ``"none"``, ``"linear"``, ``"spline"`` or ``"lowess"``.
    notes : tuple of str
        Fallbacks taken (e.g. too few distinct times for the requested spline).
    """

    fitted: np.ndarray
    residual: np.ndarray
    curve: pd.DataFrame
    description: str
    method: str
    notes: tuple[str, ...] = ()


# --------------------------------------------------------------------------- public API
def detrend(panel: Panel, *, method: str, spline_df: int = 4, lowess_frac: float = 0.3,
            groups=None) -> Detrended:
    """Fit a mean trend in time to all rows and return fitted values and residuals.

    Parameters
    ----------
    panel : Panel
        Group-sorted repeated measures.
    method : {"none", "linear", "spline", "lowess"}, keyword-only
        ``"none"``: the grand mean. ``"linear"``: pooled OLS of y on time.
        ``"spline"``: natural cubic regression spline in time with
        ``spline_df`` degrees of freedom besides the intercept (knots: see
        Notes). ``"lowess"``: locally weighted linear regression on the pooled
        (time, y) points, linearly interpolated back to the rows.
    spline_df : int
        Spline degrees of freedom (>= 1; 1 is a straight line).
    lowess_frac : float
        Share of the points used in each local fit, in (0, 1].
    groups : int array (n_obs,), optional
        Group of each row (e.g. stratum code of its subject). Each group
        >= 0 gets its own fit; rows with group -1 use the pooled fit.

    Returns
    -------
    Detrended

    Notes
    -----
    Natural cubic spline: ``K = spline_df + 1`` knots ``ξ_1 < ... < ξ_K`` with
    the outer knots at the smallest and largest time and the inner ones at
    equally spaced quantiles of the distinct times. The basis is the
    truncated-power form of a cubic that is linear beyond the outer knots::

        N_1 = 1,  N_2 = t,  N_{j+2} = d_j - d_{K-1}   (j = 1..K-2)
        d_j(t) = ((t - ξ_j)_+^3 - (t - ξ_K)_+^3) / (ξ_K - ξ_j)

    computed on time rescaled to [0, 1] for conditioning, fitted by least
    squares. Lowess uses one pass (no robustness iterations, so the curve is a
    local mean, not a local median-like fit) and ``delta`` =
    ``LOWESS_DELTA_FRACTION`` of the time range.

    References
    ----------
    Hastie, Tibshirani & Friedman, *The Elements of Statistical Learning*,
    2nd ed., section 5.2.1 (natural cubic splines). Cleveland (1979), JASA 74,
    829-836 (lowess). Diggle, Heagerty, Liang & Zeger, *Analysis of
    Longitudinal Data*, 2nd ed., section 3.4 (residuals for the variogram).
    """
    check_choice(method, opt.DETRENDS)
    if isinstance(spline_df, bool) or not isinstance(spline_df, (int, np.integer)) or spline_df < 1:
        raise SettingsError(f"Spline degrees of freedom must be a whole number of at least 1, "
                            f"not {spline_df!r}.",
                            field="spline_df")
    lowess_frac = float(lowess_frac)
    check_value("lowess_frac", lowess_frac)
    t, y = panel.time, panel.y
    if groups is not None:
        groups = np.asarray(groups)
        if groups.shape != t.shape:
            raise DataError(f"groups has {groups.size} entries, expected one per row ({t.size})")
        if groups.size and (not np.issubdtype(groups.dtype, np.integer) or groups.min() < -1):
            raise DataError("groups must be integers >= -1 (-1 = use the pooled fit)")
    if t.size == 0:
        empty = np.empty(0)
        return Detrended(empty, empty, pd.DataFrame({"group": np.empty(0, np.int64), "time": empty,
                                                     "fitted": empty}),
                         "No observations to detrend.", method)

    notes: list[str] = []
    sd = int(spline_df)
    fitted, pooled_curve, text = _fit_with_curve(-1, t, y, method, sd, lowess_frac, notes)
    curves = [pooled_curve]
    n_groups = 0
    if groups is not None:
        fitted = fitted.copy()
        for g in np.unique(groups[groups >= 0]):  # loop over strata, not subjects
            rows = groups == g
            sub_notes: list[str] = []
            fitted[rows], curve_g, _ = _fit_with_curve(int(g), t[rows], y[rows], method, sd,
                                                       lowess_frac, sub_notes)
            notes.extend(f"group {int(g)}: {n}" for n in sub_notes)
            curves.append(curve_g)
            n_groups += 1
    description = f"Mean trend removed: {text}"
    if n_groups:
        description += f", fitted separately within each of {n_groups} groups"
    description += "."
    curve = pd.concat(curves, ignore_index=True)
    return Detrended(fitted=fitted, residual=y - fitted, curve=curve, description=description,
                     method=method, notes=tuple(notes))


# --------------------------------------------------------------------------- helpers
def _fit(t, y, at, method, spline_df, frac, notes):
    """Fit the mean model on (t, y) and evaluate it at ``at``; returns (values, None, text)."""
    distinct, where = np.unique(t, return_inverse=True)
    if method == "none" or distinct.size == 1:
        if method != "none":
            notes.append("all times are equal; used the mean")
        return np.full(np.shape(at), float(np.mean(y))), None, "grand mean"
    if method == "linear" or (method == "spline" and spline_df == 1):
        knots = np.array([t.min(), t.max()])
        return _distinct_lstsq(t, y, at, distinct, where, knots), None, \
            "straight line in time (pooled least squares)"
    if method == "spline":
        knots, text = spline_plan(distinct, spline_df, notes)
        return _distinct_lstsq(t, y, at, distinct, where, knots), None, text
    xs, fs = _lowess_curve(t, y, frac)
    if not np.all(np.isfinite(fs)):
        notes.append("too few points for lowess; used a straight line")
        return _fit(t, y, at, "linear", spline_df, frac, notes)
    return np.interp(at, xs, fs), None, f"lowess smooth of time (span {frac:g} of the points)"


def _distinct_lstsq(t, y, at, distinct, where, knots):
    """Pooled least-squares fit of y on the natural spline basis (``knots``) of t, evaluated
    at ``at``; ``distinct``, ``where`` = ``np.unique(t, return_inverse=True)``.

    The basis is elementwise in time, so the fit is done on the distinct times: each with the
    mean of its responses, weighted by how many there are (the same coefficients as on every
    row, since the squared error is the within-time part, which the coefficients do not
    change, plus n_d (mean_d - fit_d)^2). The rows' values are then gathered from the
    distinct times'. At a million rows this is a few ms instead of a least-squares solve on a
    million-row design.
    """
    basis = natural_spline_basis(distinct, knots, intercept=True)
    n = np.bincount(where, minlength=distinct.size).astype(float)
    mean = np.bincount(where, weights=y, minlength=distinct.size) / n
    w = np.sqrt(n)
    beta, *_ = np.linalg.lstsq(basis * w[:, None], mean * w, rcond=None)
    fitted = basis @ beta
    if at.size >= t.size and np.array_equal(at[:t.size], t):
        rest = at[t.size:]
        return np.concatenate((fitted[where], natural_spline_basis(rest, knots, intercept=True)
                               @ beta if rest.size else np.empty(0)))
    return natural_spline_basis(at, knots, intercept=True) @ beta


def spline_plan(distinct_times, spline_df: int, notes: list) -> tuple[np.ndarray, str]:
    """(knots, description) of the detrending spline from the distinct times (>= 2 of them)."""
    n_unique = distinct_times.size
    use_df = min(spline_df, n_unique - 1)
    if use_df < spline_df:
        notes.append(f"only {n_unique} distinct times; spline uses {use_df} df "
                     f"instead of {spline_df}")
    knots = spline_knots(distinct_times, use_df, rule="distinct")
    text = (f"natural cubic spline in time with {knots.size - 1} df "
            f"(knots at {', '.join(f'{k:.3g}' for k in knots)})")
    if use_df < spline_df:
        text += f"; {spline_df} df were asked for, but there are only {n_unique} distinct times"
    return knots, text


def _lowess_curve(t, y, frac):
    """Lowess fitted values at the distinct times (sorted)."""
    delta = LOWESS_DELTA_FRACTION * float(np.ptp(t))
    out = _sm_lowess(y, t, frac=frac, it=0, delta=delta, return_sorted=True)
    xs, idx = np.unique(out[:, 0], return_index=True)
    return xs, out[idx, 1]


def _fit_with_curve(group, t, y, method, spline_df, frac, notes):
    """Fit once; return (values at the rows, curve frame on a grid, description text)."""
    lo, hi = float(np.min(t)), float(np.max(t))
    grid = np.linspace(lo, hi, CURVE_POINTS) if hi > lo else np.array([lo])
    values, _, text = _fit(t, y, np.concatenate((t, grid)), method, spline_df, frac, notes)
    curve = pd.DataFrame({"group": np.full(grid.size, group, dtype=np.int64), "time": grid,
                          "fitted": values[t.size:]})
    return values[:t.size], curve, text
