"""Empirical semivariogram of within-subject residuals and a descriptive variance split.

For residuals ``r`` (the lead passes detrended residuals in ``panel.y``) every
within-subject pair ``j < k`` gives a lag ``u = |t_j - t_k|`` and a half squared
difference ``v = (r_j - r_k)^2 / 2``. Under a stationary model
``r = b + W(t) + e`` (random intercept ``b``, serial process ``W``, measurement
error ``e``), ``E[v | u] = nugget + serial * (1 - rho(u))``, rising from the
measurement-error variance at ``u -> 0`` to a plateau, while half squared
differences of observations from *different* subjects estimate the total
(process) variance. References: Diggle, Heagerty, Liang & Zeger (2002),
*Analysis of Longitudinal Data*, 2nd ed., section 5.2; Verbeke & Molenberghs
(2000), *Linear Mixed Models for Longitudinal Data*, section 10.3.
"""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from ..errors import DataError, SettingsError
from .lagbins import EDGE_TOL, bin_index, lattice_step, merge_close, within_edge
from .pairs import DEFAULT_CHUNK_PAIRS, iter_pair_chunks, n_within_pairs, within_pair_rows
from ..preparation.panel import Panel
from ..jsonsafe import json_float

#: points at which the smooth is reported (0 .. largest used lag)
SMOOTH_GRID_POINTS = 61
#: the plateau is the mean of the smooth over this top share of the lag range
PLATEAU_SHARE = 0.2

CAVEAT = (
    "The split of the process variance into measurement error, serial correlation and "
    "between-subject parts is descriptive: it reads the smoothed semivariogram at short and "
    "long lags and assumes the residuals are stationary (variance and correlation depending "
    "only on the lag). If subjects differ in their rate of change (a random slope), the "
    "semivariogram keeps rising with the lag instead of levelling off, and the shares are "
    "then only indicative."
)

BIN_COLUMNS = ("lag_lo", "lag_hi", "lag_mean", "gamma", "pairs")
SMOOTH_COLUMNS = ("lag", "gamma")


@dataclass(frozen=True)
class VarianceReadout:
    """Descriptive split of the process variance read off the smoothed semivariogram.

    Attributes
    ----------
    nugget : float
        Measurement-error variance: the smooth extrapolated to lag 0.
    serial : float
        Serially correlated variance: ``plateau - nugget`` (floored at 0).
    between : float
        Between-subject (random-intercept) variance: ``process_variance - plateau``
        (floored at 0).
    plateau : float
        Within-subject level reached at long lags: mean of the smooth over the
        top :data:`PLATEAU_SHARE` of the lag range.
    shares : dict
        Same keys (``nugget``, ``serial``, ``between``, ``plateau``) as fractions
        of the process variance.
    """

    nugget: float
    serial: float
    between: float
    plateau: float
    shares: dict = field(default_factory=dict)

    def to_json(self) -> dict:
        return {"nugget": json_float(self.nugget), "serial": json_float(self.serial),
                "between": json_float(self.between), "plateau": json_float(self.plateau),
                "shares": {k: json_float(v) for k, v in self.shares.items()}}


@dataclass(frozen=True, eq=False)
class Semivariogram:
    """Binned and smoothed empirical semivariogram with a process-variance reference.

    Attributes
    ----------
    bins : DataFrame
        One row per lag bin: ``lag_lo``, ``lag_hi`` (bin edges),
        ``lag_mean`` (mean lag of the pairs in the bin, NaN if empty), ``gamma``
        (mean half squared difference, NaN if empty), ``pairs`` (pair count).
    smooth : DataFrame
        Lowess smooth of the half squared differences on the lag, evaluated on
        a grid from 0 to the largest used lag: ``lag``, ``gamma``.
    process_variance : float
        Mean half squared difference over all pairs of observations from
        different subjects (NaN with one subject).
    n_pairs : int
        Within-subject pairs used (lag <= max_lag).
    max_lag : float
        Longest lag used (upper edge of the last equal-width bin; on a
        schedule the last bin is centred on the longest lag at or below it).
    readout : VarianceReadout
        Descriptive variance split.
    notes : tuple of str
        What was done beyond the plain computation (subsampling, floors, exclusions).
    caveat : str
        How far to trust the variance split.
    """

    bins: pd.DataFrame
    smooth: pd.DataFrame
    process_variance: float
    n_pairs: int
    max_lag: float
    readout: VarianceReadout
    notes: tuple[str, ...] = ()
    caveat: str = CAVEAT

    def to_frame(self) -> pd.DataFrame:
        """The binned semivariogram (a copy of :attr:`bins`)."""
        return self.bins.copy()

    def to_json(self) -> dict:
        """Plain-dict form (NaN becomes None)."""
        return {
            "bins": [{k: json_float(row[k]) if k != "pairs" else int(row[k]) for k in BIN_COLUMNS}
                     for row in self.bins.to_dict("records")],
            "process_variance": json_float(self.process_variance),
            "smooth": [{k: json_float(row[k]) for k in SMOOTH_COLUMNS}
                       for row in self.smooth.to_dict("records")],
            "readout": self.readout.to_json(),
            "n_pairs": int(self.n_pairs),
            "max_lag": json_float(self.max_lag),
            "notes": list(self.notes),
            "caveat": self.caveat,
        }


# ---------------------------------------------------------------------------
def within_pairs(panel: Panel) -> tuple[np.ndarray, np.ndarray]:
    """Lags and half squared differences of every within-subject pair.

    Parameters
    ----------
    panel : Panel
        ``panel.y`` holds the residuals.

    Returns
    -------
    lag, half_sq : float arrays (n_pairs,)
        ``|t_j - t_k|`` and ``(r_j - r_k)^2 / 2``, in the order of
        :func:`analysis.exploration.pairs.iter_pair_chunks`.
    """
    a, b = within_pair_rows(panel.starts, panel.counts)
    return np.abs(panel.time[b] - panel.time[a]), 0.5 * (panel.y[b] - panel.y[a]) ** 2


def process_variance(panel: Panel) -> float:
    """Mean half squared difference over all between-subject pairs, in O(N).

    Parameters
    ----------
    panel : Panel

    Returns
    -------
    float
        NaN when there are no between-subject pairs (a single subject).

    Notes
    -----
    With ``r`` centred by its overall mean, per-subject sums ``S_i = sum r``,
    ``Q_i = sum r^2`` and ``N = sum n_i``:

    ``sum_{a<b, different subjects} (r_a - r_b)^2 = sum_i Q_i (N - n_i) + sum_i S_i^2``

    which equals ``[N sum r^2 - (sum r)^2] - sum_i [n_i Q_i - S_i^2]`` (all pairs
    minus within-subject pairs) but adds only non-negative terms. The number of
    between-subject pairs is ``(N^2 - sum n_i^2) / 2``.
    """
    n = panel.counts.astype(float)
    big_n = float(n.sum())
    n_between = (big_n ** 2 - float(np.sum(n ** 2))) / 2.0
    if n_between <= 0:
        return float("nan")
    r = panel.y - panel.y.mean()
    m = panel.n_subjects
    s = np.bincount(panel.codes, weights=r, minlength=m)
    q = np.bincount(panel.codes, weights=r * r, minlength=m)
    total = float(np.sum(q * (big_n - n)) + np.sum(s * s))
    return 0.5 * total / n_between


def semivariogram(panel: Panel, *, n_bins: int = 10, max_lag: float | None = None,
                  smooth_frac: float = 0.3, smooth_max_pairs: int = 20000,
                  seed: int = 0, chunk_pairs: int = DEFAULT_CHUNK_PAIRS) -> Semivariogram:
    """Empirical semivariogram of residuals, binned and smoothed.

    Parameters
    ----------
    panel : Panel
        Group-sorted panel whose ``y`` holds residuals (e.g. detrended).
    n_bins : int, keyword-only
        Number of equal-width lag bins on ``[0, max_lag]``; when the lags lie
        on a schedule with at most this many distinct lags, one bin per lag.
    max_lag : float or None
        Largest lag used; pairs with a longer lag are left out. Default: the
        largest within-subject lag.
    smooth_frac : float in (0, 1]
        Lowess span (share of pairs in each local fit).
    smooth_max_pairs : int
        If more pairs than this, the lowess runs through a seeded uniform
        random subsample of the pairs (said in ``notes``).
    seed : int
        Seed of that subsample.
    chunk_pairs : int
        Pairs handled at once (memory bound).

    Returns
    -------
    Semivariogram

    Notes
    -----
    Bins: edges ``k * max_lag / n_bins``; a pair with lag ``u`` falls in bin
    ``floor(u / width + EDGE_TOL)`` (the last bin is closed on the right), the
    edge rule shared with the lag correlation's windows
    (:mod:`analysis.exploration.lagbins`): a lag on an edge up to float rounding goes to
    the bin above it; ``gamma_k = sum v / count`` via ``np.bincount`` with
    weights.

    Visits on a fixed schedule: lags closer than ``EDGE_TOL * max_lag`` are
    one lag. When there are at most ``n_bins`` distinct lags and they all are
    multiples of one step ``s`` (up to ``EDGE_TOL * s``), each lag gets its own
    bin ``[c - s/2, c + s/2]`` centred on its multiple ``c`` of ``s`` (lower
    edge floored at 0), so pairs of one nominal lag are never split between
    bins nor pooled with another lag. Bins then number the distinct lags.

    Smooth: ``statsmodels`` lowess with no robustness iterations (``it=0``):
    the half squared differences are skewed (scaled chi-square with 1 d.f.
    for Gaussian residuals), and robustness weights would pull the curve
    below the mean. If lags are heavily tied (a fixed visit schedule) the span
    is widened so every local fit spans at least two distinct lags.

    Read-out: ``nugget`` is the lowess local-linear fit evaluated at lag 0
    (an extrapolation from the shortest lags); ``plateau`` is the mean of the
    smooth over grid points in the top 20% of the lag range;
    ``serial = plateau - nugget``; ``between = process_variance - plateau``.
    Negative values are floored at 0 and said in ``notes``.

    References
    ----------
    Diggle, Heagerty, Liang & Zeger (2002), section 5.2 and figure 5.6.
    """
    _check_options(n_bins=n_bins, max_lag=max_lag, smooth_frac=smooth_frac,
                   smooth_max_pairs=smooth_max_pairs, chunk_pairs=chunk_pairs)
    _check_values(panel)
    total_pairs = n_within_pairs(panel.counts)
    if total_pairs == 0:
        raise DataError("the semivariogram needs at least one subject with 2 or more visits; "
                        "every subject has a single visit")
    notes: list[str] = []
    t, r = panel.time, panel.y
    longest = _longest_lag(panel)
    if max_lag is None:
        if not longest > 0:
            raise DataError("the semivariogram needs within-subject lags > 0; every subject's "
                            "visits are at the same time")
        max_lag = longest
    max_lag = float(max_lag)
    width = max_lag / n_bins
    # distinct lags, tracked while there are no more than n_bins of them (a fixed schedule)
    track: _LagTally | None = _LagTally(scale=max_lag, limit=n_bins)

    # seeded subsample of pair positions for the smooth (positions in chunk order)
    if total_pairs > smooth_max_pairs:
        rng = np.random.default_rng(seed)
        pick = np.sort(rng.choice(total_pairs, size=smooth_max_pairs, replace=False))
    else:
        pick = None

    sums = np.zeros(n_bins)
    counts = np.zeros(n_bins, dtype=np.int64)
    lag_sums = np.zeros(n_bins)
    smooth_u, smooth_v = [], []
    offset = 0
    for a, b in iter_pair_chunks(panel.starts, panel.counts, max_pairs=chunk_pairs):
        u = np.abs(t[b] - t[a])
        v = 0.5 * (r[b] - r[a]) ** 2
        k = u.size
        if pick is None:
            sel_u, sel_v = u, v
        else:
            lo, hi = np.searchsorted(pick, [offset, offset + k])
            idx = pick[lo:hi] - offset
            sel_u, sel_v = u[idx], v[idx]
        offset += k
        keep = within_edge(sel_u, max_lag, width=width)
        smooth_u.append(sel_u[keep])
        smooth_v.append(sel_v[keep])
        inside = within_edge(u, max_lag, width=width)
        u, v = u[inside], v[inside]
        if track is not None and not track.add(u, v):
            track = None
        which = bin_index(u, start=0.0, width=width, n=n_bins)
        sums += np.bincount(which, weights=v, minlength=n_bins)
        lag_sums += np.bincount(which, weights=u, minlength=n_bins)
        counts += np.bincount(which, minlength=n_bins)

    n_used = int(counts.sum())
    if n_used == 0:
        raise DataError(f"no within-subject pair has a lag <= max_lag ({max_lag:g}); "
                        f"the shortest lags are longer, so raise max_lag")
    if n_used < total_pairs:
        notes.append(f"{total_pairs - n_used:,} of {total_pairs:,} within-subject pairs are "
                     f"further apart in time than the longest lag shown ({max_lag:g}) "
                     "and were left out.")
    step = lattice_step(track.lags) if track is not None else None
    if step is not None:
        centre = np.rint(track.lags / step) * step
        lo, hi = np.maximum(centre - step / 2, 0.0), centre + step / 2
        sums, lag_sums, counts = track.v_sum, track.u_sum, track.count
        notes.append(f"The lags lie on a schedule (multiples of {step:.4g}): one bin per lag "
                     f"({counts.size} bin{'s' if counts.size != 1 else ''}), each centred on "
                     "its lag.")
    else:
        lo = np.arange(n_bins) * width
        hi = np.append(lo[1:], max_lag)
    with np.errstate(invalid="ignore", divide="ignore"):
        gamma = np.where(counts > 0, sums / np.maximum(counts, 1), np.nan)
        lag_mean = np.where(counts > 0, lag_sums / np.maximum(counts, 1), np.nan)
    bins = pd.DataFrame({"lag_lo": lo, "lag_hi": hi, "lag_mean": lag_mean,
                         "gamma": gamma, "pairs": counts})

    su = np.concatenate(smooth_u)
    sv = np.concatenate(smooth_v)
    if pick is not None:
        notes.append(f"The smooth runs through a random subsample of {su.size:,} of "
                     f"{n_used:,} pairs (seed {seed}).")
    smooth = _smooth(su, sv, frac=smooth_frac, notes=notes)

    pv = process_variance(panel)
    if not np.isfinite(pv):
        notes.append("Only one subject: no between-subject pairs, so the process variance "
                     "and the between-subject share are undefined.")
    readout = _readout(smooth, pv, notes)
    return Semivariogram(bins=bins, smooth=smooth, process_variance=float(pv),
                         n_pairs=n_used, max_lag=max_lag, readout=readout,
                         notes=tuple(notes), caveat=CAVEAT)


# ---------------------------------------------------------------------------
class _LagTally:
    """Per-lag sums over chunks while the distinct lags number at most ``limit``.

    Lags within ``EDGE_TOL * scale`` of a lag already seen join it (the first
    one seen stands for the group); :meth:`add` returns False once there are
    more than ``limit`` distinct lags, after which the tally is dropped.
    """

    def __init__(self, *, scale: float, limit: int):
        self.tol = EDGE_TOL * scale
        self.scale = scale
        self.limit = limit
        self.lags = np.empty(0)
        self.u_sum = np.empty(0)
        self.v_sum = np.empty(0)
        self.count = np.empty(0, dtype=np.int64)

    def _nearest(self, u: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        d = self.lags
        if d.size == 0:
            return np.zeros(u.size, dtype=np.int64), np.zeros(u.size, dtype=bool)
        right = np.clip(np.searchsorted(d, u), 0, d.size - 1)
        left = np.maximum(right - 1, 0)
        near = np.where(np.abs(u - d[left]) <= np.abs(u - d[right]), left, right)
        return near, np.abs(u - d[near]) <= self.tol

    def add(self, u: np.ndarray, v: np.ndarray) -> bool:
        near, matched = self._nearest(u)
        if not matched.all():
            fresh = u[~matched]
            # cheap early exit for irregular visits: a short head already has too many lags
            head, _ = merge_close(fresh[:4 * self.limit + 4], scale=self.scale)
            if self.lags.size + head.size > self.limit:
                return False
            new, _ = merge_close(fresh, scale=self.scale)
            if self.lags.size + new.size > self.limit:
                return False
            lags = np.concatenate((self.lags, new))
            order = np.argsort(lags, kind="stable")
            pad = np.zeros(new.size)
            self.lags = lags[order]
            self.u_sum = np.concatenate((self.u_sum, pad))[order]
            self.v_sum = np.concatenate((self.v_sum, pad))[order]
            self.count = np.concatenate((self.count, pad.astype(np.int64)))[order]
            near, _ = self._nearest(u)
        m = self.lags.size
        self.u_sum += np.bincount(near, weights=u, minlength=m)
        self.v_sum += np.bincount(near, weights=v, minlength=m)
        self.count += np.bincount(near, minlength=m)
        return True


def _smooth(u: np.ndarray, v: np.ndarray, *, frac: float, notes: list[str]) -> pd.DataFrame:
    """Lowess of ``v`` on ``u`` on a grid ``0 .. max(u)``; falls back to per-lag means."""
    from statsmodels.nonparametric.smoothers_lowess import lowess

    # lags equal up to float rounding (dates converted to months) count as ties
    distinct, tie_of = merge_close(u, scale=float(u.max()) if u.size else 1.0)
    tie_counts = np.bincount(tie_of, minlength=distinct.size)
    if distinct.size < 3:
        means = np.bincount(tie_of, weights=v, minlength=distinct.size) / tie_counts
        notes.append(f"Only {distinct.size} distinct lag(s): the smooth is the mean at each lag "
                     "and the lag-0 value is the mean at the shortest lag.")
        lag = np.concatenate(([0.0], distinct)) if distinct[0] > 0 else distinct
        gam = np.concatenate(([means[0]], means)) if distinct[0] > 0 else means
        return pd.DataFrame({"lag": lag, "gamma": gam})
    need = min(1.0, (2 * int(tie_counts.max()) + 1) / u.size)
    if need > frac:
        notes.append(f"Many pairs share the same lag (fixed visit schedule): the smooth's span "
                     f"was widened from {frac:g} to {need:.3g} of the pairs.")
        frac = need
    grid = np.linspace(0.0, float(distinct[-1]), SMOOTH_GRID_POINTS)
    fit = lowess(v, u, frac=frac, it=0, xvals=grid)
    ok = np.isfinite(fit)
    if not ok.all():
        notes.append(f"The smooth is undefined at {int((~ok).sum())} grid lag(s), left out.")
    return pd.DataFrame({"lag": grid[ok], "gamma": fit[ok]})


def _readout(smooth: pd.DataFrame, pv: float, notes: list[str]) -> VarianceReadout:
    lag = smooth["lag"].to_numpy(dtype=float)
    gam = smooth["gamma"].to_numpy(dtype=float)
    if lag.size == 0:
        nan = float("nan")
        return VarianceReadout(nan, nan, nan, nan,
                               {"nugget": nan, "serial": nan, "between": nan, "plateau": nan})
    nugget = float(gam[0])
    top = lag >= lag[0] + (1.0 - PLATEAU_SHARE) * (lag[-1] - lag[0])
    plateau = float(gam[top].mean())
    serial = plateau - nugget
    between = pv - plateau
    parts = {"nugget": nugget, "serial": serial, "between": between, "plateau": plateau}
    for name in ("nugget", "serial", "between", "plateau"):
        if parts[name] < 0:
            notes.append(f"The {name} estimate was negative ({parts[name]:.4g}) and is shown as 0.")
            parts[name] = 0.0
    shares = {k: (v / pv if np.isfinite(pv) and pv > 0 else float("nan"))
              for k, v in parts.items()}
    return VarianceReadout(parts["nugget"], parts["serial"], parts["between"],
                           parts["plateau"], shares)


def _longest_lag(panel: Panel) -> float:
    last = panel.starts + panel.counts - 1
    return float(np.max(np.abs(panel.time[last] - panel.time[panel.starts])))


def _check_values(panel: Panel) -> None:
    for name, arr in (("time", panel.time), ("response", panel.y)):
        bad = np.flatnonzero(~np.isfinite(arr))
        if bad.size:
            raise DataError(f"the semivariogram needs finite {name} values; {bad.size} "
                            f"observation(s) are missing or infinite (first in subject "
                            f"number {int(panel.codes[bad[0]])} of the analysed cohort)")


def _check_options(*, n_bins, max_lag, smooth_frac, smooth_max_pairs, chunk_pairs) -> None:
    if isinstance(n_bins, bool) or not isinstance(n_bins, (int, np.integer)) or n_bins < 1:
        raise SettingsError(f"n_bins == {n_bins!r}, must be a whole number >= 1")
    if max_lag is not None and not (np.isfinite(max_lag) and max_lag > 0):
        raise SettingsError(f"max_lag == {max_lag!r}, must be > 0")
    if not 0 < smooth_frac <= 1:
        raise SettingsError(f"smooth_frac == {smooth_frac!r}, must be in (0, 1]")
    if smooth_max_pairs < 10:
        raise SettingsError(f"smooth_max_pairs == {smooth_max_pairs!r}, must be >= 10")
    if chunk_pairs < 1:
        raise SettingsError(f"chunk_pairs == {chunk_pairs!r}, must be >= 1")


def _num(x):
    x = float(x)
    return x if np.isfinite(x) else None


#: lag grid points of a fitted model's implied semivariogram curve
CURVE_POINTS = 160


def model_curves(fits, max_lag: float, n: int = CURVE_POINTS) -> pd.DataFrame:
    """Each fitted model's implied semivariogram on ``n`` lags from 0 to ``max_lag``.

    ``fits`` maps a model name to a fit with ``variogram_curve(lags)`` (e.g.
    ``ModelSet.fits``). Returns columns model, lag, gamma (models in ``fits`` order).
    """
    lags = np.linspace(0.0, float(max_lag), n)
    parts = [pd.DataFrame({"model": name, "lag": lags, "gamma": fit.variogram_curve(lags)})
             for name, fit in fits.items()]
    return (pd.concat(parts, ignore_index=True) if parts
            else pd.DataFrame({"model": [], "lag": [], "gamma": []}))
