"""One rule for cutting times or lags into bins when values may lie on an edge.

Times converted from dates (days / 30.4375 for months) carry floating-point
noise: a nominal 6-month lag arrives as 5.999999999999 or 6.000000000001. Both
the lag correlation's time windows and the semivariogram's lag bins use the
rule here, so a value nominally on an edge always goes to the same side:

* :data:`EDGE_TOL` is an allowance measured in bin widths: a value within
  ``EDGE_TOL * width`` below an edge counts as lying on it, and an edge value
  belongs to the bin above it (:func:`bin_index`).
* Values closer than ``EDGE_TOL * scale`` are the same value
  (:func:`merge_close`), and a set of values lies on a lattice ``k * step``
  when each is within ``EDGE_TOL * step`` of a multiple of ``step``
  (:func:`lattice_step`).

Bins given by an array of edges (equal-width time bins of the dropout profiles and the
mean-response figure, strata cut on a covariate) use :func:`edge_bin`: exact comparison
with the edges, the same side rule (an edge value goes to the bin above it, the last bin
keeps its right edge) but no allowance, since those edges are not on a time lattice.
:func:`equal_width_edges` makes the equal-width edges.
"""
from __future__ import annotations

import math

import numpy as np

#: allowance (in bin widths) for values lying on a bin edge up to float rounding
EDGE_TOL = 1e-9
#: a lattice step is searched among ``smallest / q`` for q = 1 .. this
MAX_LATTICE_DIVISOR = 1000


def bin_index(x, *, start: float, width: float, n: int) -> np.ndarray:
    """Bin ``k`` of ``[start + k w, start + (k + 1) w)`` holding each value, clipped to 0..n-1.

    Parameters
    ----------
    x : float array
    start, width : float, keyword-only
        Left edge of bin 0 and bin width (> 0).
    n : int
        Number of bins; values below bin 0 go to bin 0, above the last to bin n-1.

    Returns
    -------
    int64 array like ``x``
        ``floor((x - start) / width + EDGE_TOL)`` clipped: a value on an edge
        (up to float rounding) is in the bin above it.
    """
    k = np.floor((np.asarray(x, dtype=float) - start) / width + EDGE_TOL).astype(np.int64)
    return np.clip(k, 0, n - 1)


def bin_count(lo: float, hi: float, *, width: float) -> int:
    """Bins of ``width`` from ``lo`` needed so that ``hi`` falls in one, by :func:`bin_index`'s rule."""
    return int(math.floor((hi - lo) / width + EDGE_TOL)) + 1


def within_edge(x, limit: float, *, width: float) -> np.ndarray:
    """``x <= limit`` allowing ``EDGE_TOL * width`` of rounding above the limit."""
    return np.asarray(x, dtype=float) <= limit + EDGE_TOL * width


def merge_close(values, *, scale: float) -> tuple[np.ndarray, np.ndarray]:
    """Distinct values, treating values closer than ``EDGE_TOL * scale`` as one.

    Parameters
    ----------
    values : float array
    scale : float, keyword-only
        Size of the values' range (e.g. the largest lag).

    Returns
    -------
    distinct : float array (m,)
        Sorted; each is the mean of the values merged into it.
    which : int64 array like ``values``
        Index into ``distinct`` of each value.
    """
    v = np.asarray(values, dtype=float)
    if v.size == 0:
        return np.empty(0), np.empty(0, dtype=np.int64)
    uniq, inverse, counts = np.unique(v, return_inverse=True, return_counts=True)
    new_group = np.r_[True, np.diff(uniq) > EDGE_TOL * abs(scale)]
    group_of_uniq = np.cumsum(new_group) - 1
    m = int(group_of_uniq[-1]) + 1
    sums = np.bincount(group_of_uniq, weights=uniq * counts, minlength=m)
    n = np.bincount(group_of_uniq, weights=counts, minlength=m)
    return sums / n, group_of_uniq[inverse.ravel()].astype(np.int64)


def lattice_step(distinct) -> float | None:
    """The largest step ``s`` with every value within ``EDGE_TOL * s`` of a multiple of ``s``.

    Parameters
    ----------
    distinct : float array
        Sorted distinct values >= 0 (e.g. from :func:`merge_close`); zeros are
        on every lattice and are ignored.

    Returns
    -------
    float or None
        ``s = smallest_positive / q`` for the smallest ``q`` in
        ``1 .. MAX_LATTICE_DIVISOR`` that fits; None if none fits or there is
        no positive value.
    """
    d = np.asarray(distinct, dtype=float)
    d = d[d > 0]
    if d.size == 0:
        return None
    q = np.arange(1, MAX_LATTICE_DIVISOR + 1, dtype=float)[:, None]
    ratio = d[None, :] / d[0] * q                     # multiples of s = d[0] / q
    fits = np.all(np.abs(ratio - np.rint(ratio)) <= EDGE_TOL, axis=1)
    hit = np.flatnonzero(fits)
    return float(d[0] / q[hit[0], 0]) if hit.size else None


def equal_width_edges(lo: float, hi: float, n: int) -> np.ndarray:
    """``n + 1`` equally spaced edges from ``lo`` to ``hi`` (``linspace``).

    When ``hi == lo`` there is one bin ``[lo, lo + 1]`` so that every value has a bin.
    """
    return np.linspace(lo, hi, int(n) + 1) if hi > lo else np.array([lo, lo + 1.0])


def edge_bin(x, edges) -> np.ndarray:
    """Bin ``k`` with ``edges[k] <= x < edges[k + 1]`` for each value, clipped to 0..len(edges)-2.

    Exact comparison (no :data:`EDGE_TOL`): a value equal to an inner edge is in the bin
    above it; values at or beyond the last edge go to the last bin, below the first to bin 0.
    """
    edges = np.asarray(edges, dtype=float)
    return np.clip(np.searchsorted(edges, x, side="right") - 1, 0, edges.size - 2)


def equal_width_bins(x, n: int) -> tuple[np.ndarray, np.ndarray]:
    """``n`` equal-width bins over the range of ``x``: (edges, bin of each value by :func:`edge_bin`)."""
    x = np.asarray(x, dtype=float)
    edges = equal_width_edges(float(x.min()), float(x.max()), n)
    return edges, edge_bin(x, edges)
