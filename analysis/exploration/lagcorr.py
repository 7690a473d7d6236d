"""Correlation of the response between time windows, with the subject count behind each cell.

Time is cut into equal windows ``[start + k w, start + (k + 1) w)``. Each subject
contributes one value per window it was seen in (the mean of its values there).
For every pair of windows the Pearson correlation is taken over the subjects
seen in both (pairwise-complete), and the number of such subjects is kept, so a
correlation resting on a handful of subjects is visibly so. With irregular
visits this is the usual way to look at how correlation decays with the time
between measurements (Diggle, Heagerty, Liang & Zeger 2002, section 3.4;
Fitzmaurice, Laird & Ware 2011, section 2.4).
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import pandas as pd

from ..errors import DataError, SettingsError
from .lagbins import EDGE_TOL, bin_count, bin_index  # noqa: F401  (EDGE_TOL: importable here as before)
from ..preparation.panel import Panel
from ..jsonsafe import json_float

#: fewer subjects in both windows than this gives a NaN correlation (count kept)
MIN_PAIRS = 3
#: target number of windows for :func:`default_lag_width`
TARGET_WINDOWS = 8
#: windows allowed at most (guards against a tiny width over a long range)
MAX_WINDOWS = 400

WINDOW_COLUMNS = ("window", "lo", "hi", "mid", "subjects", "mean", "variance")
LONG_COLUMNS = ("window_a", "window_b", "lo_a", "hi_a", "lo_b", "hi_b", "correlation", "pairs")


@dataclass(frozen=True, eq=False)
class LagCorrelation:
    """Between-window correlation matrix with pair counts.

    Attributes
    ----------
    windows : DataFrame
        One row per window: ``window`` (0-based index), ``lo``, ``hi`` (edges,
        window is ``[lo, hi)``), ``mid``, ``subjects`` (subjects seen in it),
        ``mean`` and ``variance`` (ddof=1, NaN below 2 subjects) of the
        per-subject window values.
    matrix : float ndarray (K, K)
        Pairwise-complete Pearson correlations; NaN where fewer than
        :data:`MIN_PAIRS` subjects are seen in both windows or a variance is 0.
    pairs : int ndarray (K, K)
        Subjects seen in both windows (diagonal: subjects in the window).
    width : float
        Window width in time units.
    """

    windows: pd.DataFrame
    matrix: np.ndarray
    pairs: np.ndarray
    width: float

    def to_frame(self) -> pd.DataFrame:
        """Long form: one row per ordered window pair (``window_a``, ``window_b``)."""
        k = self.matrix.shape[0]
        ia, ib = np.divmod(np.arange(k * k), k)
        lo = self.windows["lo"].to_numpy()
        hi = self.windows["hi"].to_numpy()
        return pd.DataFrame({
            "window_a": ia, "window_b": ib, "lo_a": lo[ia], "hi_a": hi[ia],
            "lo_b": lo[ib], "hi_b": hi[ib], "correlation": self.matrix.ravel(),
            "pairs": self.pairs.ravel(),
        })

    def to_json(self) -> dict:
        """Plain-dict form (NaN becomes None)."""
        windows = []
        for row in self.windows.to_dict("records"):
            windows.append({c: (int(row[c]) if c in ("window", "subjects") else json_float(row[c]))
                            for c in WINDOW_COLUMNS})
        return {
            "windows": windows,
            "matrix": [[json_float(x) for x in row] for row in self.matrix],
            "pairs": self.pairs.astype(int).tolist(),
            "width": float(self.width),
        }


def default_lag_width(time) -> float:
    """A round window width giving about eight windows over the observed time range.

    Parameters
    ----------
    time : array-like of float

    Returns
    -------
    float
        ``range / 8`` rounded (on a log scale) to the nearest of
        ``1, 2, 2.5, 5 x 10^k``; 1.0 if the range is 0 or there are no times.

    Notes
    -----
    A convention of this project, not a statistical rule: round widths make
    window edges readable (e.g. 0-6, 6-12 months) and about eight windows keep
    enough subjects per window in typical cohorts.
    """
    t = np.asarray(time, dtype=float)
    t = t[np.isfinite(t)]
    if t.size == 0:
        return 1.0
    span = float(t.max() - t.min())
    if not span > 0:
        return 1.0
    raw = span / TARGET_WINDOWS
    power = 10.0 ** math.floor(math.log10(raw))
    steps = np.array([1.0, 2.0, 2.5, 5.0, 10.0]) * power
    return float(steps[np.argmin(np.abs(np.log(steps / raw)))])


def lag_correlation(panel: Panel, *, width: float, start: float | None = None
                    ) -> LagCorrelation:
    """Pairwise-complete correlation of per-subject window means between time windows.

    Parameters
    ----------
    panel : Panel
        Group-sorted panel; ``y`` is the response or residual.
    width : float, keyword-only
        Window width (> 0) in the panel's time unit.
    start : float or None
        Left edge of window 0 (must be <= the earliest time). Default:
        ``floor(min(time) / width) * width``.

    Returns
    -------
    LagCorrelation

    Notes
    -----
    With the wide subjects x windows table ``Y`` (zeros where missing), its
    mask ``M`` and per-window centring, for windows ``a, b``:

    ``n_ab = (M'M)_ab``, ``Sx_ab = (Y'M)_ab``, ``Sxx_ab = ((Y*Y)'M)_ab``,
    ``Sxy_ab = (Y'Y)_ab``,

    ``r_ab = (Sxy - Sx Sy / n) / sqrt((Sxx - Sx^2 / n)(Syy - Sy^2 / n))``

    with ``Sy_ab = Sx_ba`` and ``Syy_ab = Sxx_ba`` -- four matrix products
    instead of a loop over window pairs.
    """
    width = _check_width(width)
    t, y = panel.time, panel.y
    for name, arr in (("time", t), ("response", y)):
        bad = np.flatnonzero(~np.isfinite(arr))
        if bad.size:
            raise DataError(f"lag correlation needs finite {name} values; {bad.size} "
                            f"observation(s) are missing or infinite")
    if panel.n_obs == 0:
        raise DataError("lag correlation needs at least one observation; the cohort is empty")
    tmin, tmax = float(t.min()), float(t.max())
    if start is None:
        start = math.floor(tmin / width) * width
    start = float(start)
    if not np.isfinite(start) or start > tmin:
        raise SettingsError(f"start == {start!r}, must be a number <= the earliest time {tmin:g}")
    n_win = bin_count(start, tmax, width=width)
    if n_win > MAX_WINDOWS:
        raise SettingsError(f"width == {width:g} cuts the time range {start:g}..{tmax:g} into "
                            f"{n_win} windows, more than {MAX_WINDOWS}; choose a wider window")
    # shared edge rule (analysis.exploration.lagbins): a time lying on an edge up to float rounding
    # (e.g. 0.3 with width 0.1) is in the upper window
    k = bin_index(t, start=start, width=width, n=n_win)

    m = panel.n_subjects
    cell = panel.codes * n_win + k
    cnt = np.bincount(cell, minlength=m * n_win).reshape(m, n_win)
    tot = np.bincount(cell, weights=y, minlength=m * n_win).reshape(m, n_win)
    mask = cnt > 0
    wide = np.divide(tot, cnt, out=np.zeros_like(tot), where=mask)

    subjects = mask.sum(axis=0)
    col_sum = wide.sum(axis=0)
    with np.errstate(invalid="ignore", divide="ignore"):
        col_mean = col_sum / subjects
    centred = np.where(mask, wide - np.where(subjects > 0, col_mean, 0.0), 0.0)
    mf = mask.astype(float)
    n_ab = mf.T @ mf
    sx = centred.T @ mf                      # sum of x_a over subjects in both a and b
    sxx = (centred * centred).T @ mf
    sxy = centred.T @ centred
    with np.errstate(invalid="ignore", divide="ignore"):
        cov = sxy - sx * sx.T / n_ab
        var_a = sxx - sx * sx / n_ab
        var_b = var_a.T
        corr = cov / np.sqrt(var_a * var_b)
        variance = np.where(subjects > 1, np.diag(sxx) / (subjects - 1), np.nan)
    pairs = np.rint(n_ab).astype(np.int64)
    corr = np.where((pairs >= MIN_PAIRS) & (var_a > 0) & (var_b > 0), corr, np.nan)
    corr = np.clip(corr, -1.0, 1.0)

    lo = start + width * np.arange(n_win)
    hi = lo + width
    windows = pd.DataFrame({"window": np.arange(n_win), "lo": lo, "hi": hi,
                            "mid": (lo + hi) / 2, "subjects": subjects.astype(np.int64),
                            "mean": np.where(subjects > 0, col_mean, np.nan),
                            "variance": variance})
    return LagCorrelation(windows=windows, matrix=corr, pairs=pairs, width=width)


def _check_width(width) -> float:
    if width is None or isinstance(width, bool):
        raise SettingsError(f"width == {width!r}, must be a number > 0 "
                            "(use default_lag_width(time) for a default)")
    try:
        w = float(width)
    except (TypeError, ValueError):
        raise SettingsError(f"width == {width!r}, must be a number > 0") from None
    if not (np.isfinite(w) and w > 0):
        raise SettingsError(f"width == {width!r}, must be a number > 0")
    return w
