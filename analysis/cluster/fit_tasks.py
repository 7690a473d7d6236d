"""What a worker does for the mixed models: one partition's rows, design and likelihood sums.

Every function returns sums over the partition's subjects that add up over partitions to the
sums the in-memory likelihood forms over all subjects (the passes of
:mod:`analysis.models.mixed.likelihood`). Nothing here imports dask.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from analysis.models.mean_model import MeanModel, design
from analysis.models.mixed.fit import start_sums
from analysis.models.mixed.likelihood import (NotPositiveDefinite, SubjectSums, bias_reduced_scores,
                                       build_groups, build_sums, dense_first_pass,
                                       dense_second_pass, sums_first_pass, sums_gradient)
from analysis.models.mixed.structures import components
from analysis.preparation.panel import Panel


@dataclass(frozen=True, eq=False)
class ModelRows:
    """One partition's analysed rows and fixed-effects design (kept on a worker)."""

    panel: Panel
    X: np.ndarray
    design: object


def model_rows(part, keep: np.ndarray, baseline: pd.DataFrame, mean: MeanModel) -> ModelRows:
    """The partition's subjects kept for the fit, with their design rows."""
    panel = part.panel.subset_subjects(np.asarray(keep, dtype=bool))
    des = design(panel, baseline.reset_index(drop=True), mean, covariate_name="x")
    return ModelRows(panel, des.X, des)


def merge_model_rows(*rows: ModelRows) -> ModelRows:
    """Several partitions' rows as one (the subjects of each kept whole, numbered on), so that a
    likelihood evaluation is one task per worker rather than one per partition."""
    if len(rows) == 1:
        return rows[0]
    offsets = np.cumsum([0] + [r.panel.n_subjects for r in rows[:-1]])
    panel = Panel.from_codes(np.concatenate([r.panel.codes + o for r, o in zip(rows, offsets)]),
                             np.concatenate([r.panel.time for r in rows]),
                             np.concatenate([r.panel.y for r in rows]))
    return ModelRows(panel, np.vstack([r.X for r in rows]), rows[0].design)


def design_terms(rows: ModelRows):
    """The design without its rows (names, interaction term: what the client reports)."""
    from dataclasses import replace
    return replace(rows.design, X=np.empty((0, rows.X.shape[1])))


def row_checks(rows: ModelRows) -> dict:
    """What the input checks need: counts, extremes, the R factor of [X, y], y sums."""
    p, X, y = rows.panel, rows.X, rows.panel.y
    t = p.time
    spread = bool(np.any(np.maximum.reduceat(t, p.starts) > np.minimum.reduceat(t, p.starts)))
    _, r = np.linalg.qr(np.column_stack([X, y]))
    return {"n": int(y.size), "m": p.n_subjects, "bad_y": int(np.sum(~np.isfinite(y))),
            "bad_x": np.sum(~np.isfinite(X), axis=0), "x_min": X.min(axis=0),
            "x_max": X.max(axis=0), "x_first": X[0], "y_sum": float(y.sum()),
            "y_first": float(y[0]), "max_count": int(p.counts.max()), "spread": spread,
            "R": r, "abs_t": float(np.max(np.abs(t)))}


def centred_ss(rows: ModelRows, centre: float) -> float:
    d = rows.panel.y - centre
    return float(d @ d)


def start_parts(rows: ModelRows, beta: np.ndarray, time_scale: float) -> dict:
    return start_sums(rows.panel, rows.X, beta, time_scale)


def lag_span_parts(rows: ModelRows, time_scale: float) -> tuple[float, float, float]:
    """(shortest positive within-subject lag or inf, least and largest time), internal scale."""
    t = rows.panel.time / time_scale
    lags = np.diff(t)[np.diff(rows.panel.codes) == 0]
    lags = lags[lags > 0]
    return (float(lags.min()) if lags.size else np.inf, float(t.min()), float(t.max()))


def likelihood_rows(rows: ModelRows, spec, time_scale: float, shift: np.ndarray):
    """The partition's likelihood data: dense per-visit-count stacks (serial structures) or
    per-subject sums about the shared ``shift``."""
    if spec.serial:
        return build_groups(rows.panel, rows.X, spec, time_scale)
    return build_sums(rows.panel, rows.X, spec, time_scale, shift=shift)


#: the last first pass of each likelihood data object on this worker (id -> (θ, internals)),
#: so that the second pass at the same θ does not factorise the covariances again
_LAST: dict = {}


def _first(data, spec, theta, correlation, p):
    key = id(data)
    hit = _LAST.get(key)
    if hit is not None and hit[0] == theta.tobytes():
        return hit[1]
    comp = components(spec, theta)
    if isinstance(data, SubjectSums):
        T, logdet, aux = sums_first_pass(data, comp)
        out = ("sums", comp, T, logdet, aux)
    else:
        out = ("dense", comp, *dense_first_pass(data, comp, correlation, p))
    _LAST[key] = (theta.tobytes(), out)
    return out


def first_pass(data, spec, theta: np.ndarray, correlation: str, p: int) -> dict | None:
    """Sums that do not need β̂ (None when a covariance is not positive definite)."""
    if isinstance(data, list) and not data:
        return {"kind": "dense", "M": np.zeros((p, p)), "Xy": np.zeros(p), "logdet": 0.0,
                "n": 0}
    try:
        out = _first(data, spec, theta, correlation, p)
    except NotPositiveDefinite:
        return None
    if out[0] == "sums":
        _, _, T, logdet, _ = out
        return {"kind": "sums", "WW": data.WW, "T": T, "logdet": float(logdet),
                "n": data.n_obs, "shift": data.shift}
    _, _, M, Xy, logdet, n_obs, *_ = out
    return {"kind": "dense", "M": M, "Xy": Xy, "logdet": logdet, "n": n_obs}


def second_pass(data, spec, theta: np.ndarray, correlation: str, p: int, *, beta, M, w, Minv,
                gradient: bool) -> dict:
    """The quadratic form (dense stacks) and the gradient's share of these subjects."""
    from analysis.models.mixed.likelihood import _gradient

    if isinstance(data, list) and not data:
        return {"quad": 0.0, "grad": None}
    out = _first(data, spec, theta, correlation, p)
    if out[0] == "sums":
        _, comp, T, _, aux = out
        return {"quad": 0.0,
                "grad": sums_gradient(data, comp, T, aux, w, Minv) if gradient else None}
    _, comp, _, _, _, _, Vinvs, _, Bs = out
    quad, _, avecs = dense_second_pass(data, Vinvs, beta)
    grad = (_gradient(data, spec, comp, correlation, Minv is not None, M, Vinvs, avecs, Bs)
            if gradient else None)
    return {"quad": quad, "grad": grad}


def score_meat(rows: ModelRows, spec, theta, time_scale: float, beta, Minv, correlation
               ) -> np.ndarray:
    """Σ uᵢuᵢᵀ of the bias-reduced scores of the partition's subjects (sandwich meat)."""
    u = bias_reduced_scores(build_groups(rows.panel, rows.X, spec, time_scale), spec, theta,
                            beta, Minv, correlation)
    return u.T @ u


# --------------------------------------------------------------------------- residual variogram
def _ols_residuals(rows: ModelRows, beta: np.ndarray) -> Panel:
    return rows.panel.with_y(rows.panel.y - rows.X @ beta)


def ols_first(rows: ModelRows, beta: np.ndarray) -> dict:
    """Residual sum and count, longest within-subject lag and pair count (mean-model OLS)."""
    from analysis.exploration.pairs import n_within_pairs

    r = _ols_residuals(rows, beta)
    p = r
    last = p.starts + p.counts - 1
    return {"r_sum": float(r.y.sum()), "n": r.n_obs, "pairs": n_within_pairs(p.counts),
            "longest": float(np.max(np.abs(p.time[last] - p.time[p.starts])))}


def ols_second(rows: ModelRows, beta: np.ndarray, *, n_bins: int, max_lag: float, pick,
               centre: float, big_n: float) -> dict:
    """Semivariogram bin sums and process-variance sum of the mean-model OLS residuals."""
    from analysis.exploration.variogram import process_variance_sum, variogram_sums

    r = _ols_residuals(rows, beta)
    return {"variogram": variogram_sums(r, n_bins=n_bins, max_lag=max_lag, pick=pick),
            "pv_sum": process_variance_sum(r, centre, big_n)}
