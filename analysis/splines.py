"""The natural cubic spline basis in time, defined once, and its two knot rules.

The detrending step (:mod:`analysis.exploration.detrend`) and the time spline of the mixed-model mean
model (:mod:`analysis.models.mean_model`) share :func:`natural_spline_basis`. They place their
knots differently, and both rules are kept (each is part of results already reported; one
rule for both would change fitted numbers), named by :func:`spline_knots`'s ``rule``:

``"distinct"``
    Boundary knots at the smallest and largest time; ``df - 1`` interior knots at equally
    spaced quantiles of the *distinct* times; coinciding knots are merged, so fewer than
    ``df + 1`` knots come back when the times are few (detrending: a residual is still made).
``"observations"``
    The same quantile levels over *all* observations (a visit time counts as often as it is
    observed); coinciding knots are an error, since a model term must not vanish silently.
"""
from __future__ import annotations

import numpy as np

from .errors import ModelError

#: knot rules of :func:`spline_knots`
KNOT_RULES = ("distinct", "observations")


def spline_knots(t, df: int, *, rule: str) -> np.ndarray:
    """Knots of a natural spline with ``df`` degrees of freedom besides the intercept.

    Parameters
    ----------
    t : array_like of float
        Times.
    df : int
        ``df + 1`` knots before merging (rule "distinct").
    rule : {"distinct", "observations"}
        See the module docstring.

    Returns
    -------
    ndarray
        Sorted knots (distinct; ModelError under "observations" when they are not).
    """
    t = np.asarray(t, dtype=float)
    df = int(df)
    if df < 1:
        raise ModelError(f"spline df == {df}, must be >= 1")
    if rule == "distinct":
        ut = np.unique(t)
        inner = np.quantile(ut, np.linspace(0.0, 1.0, df + 1)[1:-1]) if ut.size else ut
        return np.unique(np.concatenate(([ut.min()], inner, [ut.max()])))
    if rule == "observations":
        knots = np.quantile(t, np.linspace(0.0, 1.0, df + 1))
        if np.any(np.diff(knots) <= 0):
            raise ModelError(f"spline knots {np.round(knots, 4).tolist()} are not distinct; time "
                             f"has too few distinct values for {df} df — choose fewer")
        return knots
    raise ModelError(f"knot rule {rule!r}; choose from {list(KNOT_RULES)}")


def natural_spline_basis(x, knots, *, intercept: bool = False) -> np.ndarray:
    """Natural cubic spline basis at ``x`` for sorted distinct ``knots``.

    Parameters
    ----------
    x : array_like of float
    knots : array_like of float
        At least 2 sorted distinct values ξ_1 < … < ξ_K.
    intercept : bool, keyword-only
        Put the constant column N_1 = 1 first.

    Returns
    -------
    ndarray (len(x), K - 1), or (len(x), K) with the intercept
        Columns (1,) N_2 .. N_K.

    Notes
    -----
    With s = (x − ξ_1)/(ξ_K − ξ_1) (rescaled for conditioning) and ξ̃ the rescaled knots,
    N_2 = s and N_{k+2} = d_k(s) − d_{K−1}(s) with
    d_k(s) = [(s − ξ̃_k)₊³ − (s − ξ̃_K)₊³] / (ξ̃_K − ξ̃_k), k = 1..K−2.
    The functions are cubic between knots, linear beyond the boundary knots and twice
    continuously differentiable.

    References
    ----------
    Hastie, Tibshirani & Friedman (2009), The Elements of Statistical Learning, eq. (5.4)–(5.5).
    """
    k = np.asarray(knots, dtype=float)
    lo, span = k[0], k[-1] - k[0]
    u = (np.asarray(x, dtype=float) - lo) / span
    xi = (k - lo) / span
    cols = [np.ones_like(u), u] if intercept else [u]
    if k.size > 2:
        cube = np.maximum(u[:, None] - xi[None, :], 0.0) ** 3
        d = (cube[:, :-1] - cube[:, -1:]) / (xi[-1] - xi[:-1])[None, :]
        cols.extend((d[:, :-1] - d[:, -1:]).T)
    return np.column_stack(cols)
