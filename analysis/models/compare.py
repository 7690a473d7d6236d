"""Comparing fitted models: information criteria and likelihood-ratio tests.

Works on any fit object exposing ``structure``, ``correlation``, ``method``,
``names``, ``loglik``, ``n_params``, ``aic``, ``bic``, ``converged``,
``boundary``, ``n_obs`` and ``n_subjects`` (e.g. :class:`analysis.models.mixed.MixedFit`).
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy import stats

from ..errors import ModelError
from ..jsonsafe import json_float

COLUMNS = ("model", "structure", "method", "n_params", "loglik", "aic", "bic",
           "delta_aic", "delta_bic", "converged", "boundary")


# --------------------------------------------------------------------------- nesting table
@dataclass(frozen=True)
class Nesting:
    """One nested pair of working covariance structures.

    Attributes
    ----------
    null, alt : str
        The simpler and the richer structure.
    df : int
        Number of variance parameters the alternative adds.
    n_boundary : int
        How many of them the null fixes on the edge of the parameter space
        (a variance at 0).
    mixture : tuple of (weight, df) or None
        Asymptotic null distribution of 2Δℓ when a standard result applies;
        None when it does not (then the naive χ²_df is reported as approximate).
    note : str
        Why that reference distribution.
    """

    null: str
    alt: str
    df: int
    n_boundary: int
    mixture: tuple | None
    note: str


_ONE_RE = ("the null puts one more random effect's variance on the boundary (0); "
           "50:50 mixture of χ²(k−1) and χ²(k) (Self & Liang 1987; Stram & Lee 1994)")
_SERIAL = ("the null sets the serial variance to 0 (boundary) and leaves the range "
           "unidentified, so no standard mixture applies; naive χ² is an approximation")
_MULTI = ("several variance components on the boundary at once; the exact null distribution "
          "is a mixture with data-dependent weights, naive χ² is an approximation "
          "(usually conservative)")

def derive_nesting(null_structure: str, alt_structure: str) -> Nesting | None:
    """The nesting relation of two structures, read off their components (None: not nested).

    ``null`` is nested in ``alt`` when its random effects are a leading subset of
    the alternative's (intercept ⊂ intercept+slope, the covariance counting with
    the slope) and its serial process, if any, is also in the alternative (with
    the same shape when both fix one). The alternative adds ``df`` parameters;
    the null fixes one variance at 0 per random effect and one for a serial
    process it leaves out. One random effect's variance alone: 50:50 mixture of
    χ²(df−1) and χ²(df); a serial process alone: its range is unidentified, no
    standard mixture; several at once: no standard mixture.
    """
    from .mixed.structures import spec_for

    try:
        a, b = spec_for(null_structure), spec_for(alt_structure)
    except ModelError:
        return None
    if a.name == b.name or a.n_random > b.n_random or (a.serial and not b.serial):
        return None
    if a.serial and a.shape and b.shape and a.shape != b.shape:
        return None
    df = b.n_theta - a.n_theta
    added_re, added_serial = b.n_random - a.n_random, int(b.serial and not a.serial)
    if added_re == 0 and added_serial == 0:          # same components (e.g. another shape)
        return None
    if added_serial == 0 and added_re == 1:
        return Nesting(a.name, b.name, df, 1, ((0.5, df - 1), (0.5, df)), _ONE_RE)
    if added_re == 0 and added_serial == 1:
        return Nesting(a.name, b.name, df, 1, None, _SERIAL)
    return Nesting(a.name, b.name, df, added_re + added_serial, None, _MULTI)


def nested_table() -> tuple[Nesting, ...]:
    """Every nested pair among the registered structures (derived, see :func:`derive_nesting`)."""
    from .mixed.structures import STRUCTURES

    names = list(STRUCTURES)
    return tuple(n for a in names for b in names if (n := derive_nesting(a, b)) is not None)


#: Every nested pair among the built-in structures (see :func:`nested_table`).
NESTED: tuple[Nesting, ...] = nested_table()


def nesting(null_structure: str, alt_structure: str) -> Nesting | None:
    """The :class:`Nesting` entry of a pair, or None if the pair is not nested."""
    return derive_nesting(null_structure, alt_structure)


# --------------------------------------------------------------------------- results
@dataclass(frozen=True)
class LRTResult:
    """A likelihood-ratio test of a simpler model against a richer one.

    Attributes
    ----------
    null, alt : str
        Labels of the two models.
    kind : {"covariance", "mean"}
        Whether the models differ in covariance structure or in mean model.
    statistic : float
        2(ℓ_alt − ℓ_null), floored at 0.
    df : int
        Number of extra parameters in the alternative.
    p : float
        p-value to report: from the mixture when one applies, else the naive χ²_df.
    p_naive : float
        P(χ²_df > statistic).
    mixture : tuple of (weight, df) or None
        The χ² mixture used for ``p`` (χ²_0 is a point mass at 0).
    n_boundary : int
        Parameters the null fixes on the boundary.
    method : str
        "reml" or "ml".
    reference : str
        Plain statement of the reference distribution.
    """

    null: str
    alt: str
    kind: str
    statistic: float
    df: int
    p: float
    p_naive: float
    mixture: tuple | None
    n_boundary: int
    method: str
    reference: str

    def to_json(self) -> dict:
        """Plain dict (JSON-safe; NaN → None)."""
        return {
            "null": self.null, "alt": self.alt, "kind": self.kind,
            "statistic": json_float(self.statistic), "df": int(self.df), "p": json_float(self.p),
            "p_naive": json_float(self.p_naive),
            "mixture": None if self.mixture is None else [[float(w), int(k)] for w, k in self.mixture],
            "n_boundary": int(self.n_boundary), "method": self.method, "reference": self.reference,
        }


# --------------------------------------------------------------------------- public API
def mixture_sf(x: float, mixture) -> float:
    """Upper tail P(T >= x) of a mixture Σ w_k χ²_{d_k}, χ²_0 being a point mass at 0.

    Parameters
    ----------
    x : float
    mixture : sequence of (weight, df)

    Returns
    -------
    float
    """
    if x <= 0:
        return 1.0  # P(T >= 0) = 1: an observed statistic of 0 gives no evidence at all
    total = 0.0
    for w, k in mixture:
        total += 0.0 if k == 0 else w * float(stats.chi2.sf(x, k))
    return float(total)


def likelihood_ratio(null_fit, alt_fit, *, null_label: str | None = None,
                     alt_label: str | None = None) -> LRTResult:
    """Likelihood-ratio test of two nested fits.

    Parameters
    ----------
    null_fit, alt_fit
        Fits on the same data. Either (a) same mean model, the null's covariance
        structure nested in the alternative's (see :data:`NESTED`), REML or ML;
        or (b) same covariance structure, the null's fixed-effect terms a subset
        of the alternative's, both fitted by ML.
    null_label, alt_label : str, optional
        Display names (default: ``fit.label`` or the structure name).

    Returns
    -------
    LRTResult

    Raises
    ------
    ModelError
        Different data, different methods, REML fits with different mean
        models, both parts differing, a non-nested pair, or different serial
        correlation functions.

    Notes
    -----
    T = 2(ℓ₁ − ℓ₀). With one extra random effect the null variance lies on
    the boundary and T ~ ½χ²_{k−1} + ½χ²_k asymptotically, k the number of
    added parameters (Self & Liang, 1987; Stram & Lee, 1994; Verbeke &
    Molenberghs, 2000, §6.3.4). REML log-likelihoods depend on the fixed-effect
    design, so REML fits are comparable only with the same mean model.
    """
    nl = null_label or _label(null_fit)
    al = alt_label or _label(alt_fit)
    if null_fit.n_obs != alt_fit.n_obs or null_fit.n_subjects != alt_fit.n_subjects:
        raise ModelError(f"'{nl}' and '{al}' were fitted to different data "
                         f"({null_fit.n_subjects}/{null_fit.n_obs} vs {alt_fit.n_subjects}/"
                         f"{alt_fit.n_obs} subjects/visits); refit on the same cohort")
    if null_fit.method != alt_fit.method:
        raise ModelError(f"'{nl}' uses {null_fit.method.upper()} and '{al}' uses "
                         f"{alt_fit.method.upper()}; refit both with the same method")
    method = null_fit.method
    same_mean = tuple(null_fit.names) == tuple(alt_fit.names)
    same_cov = null_fit.structure == alt_fit.structure
    if not same_mean:
        if method == "reml":
            raise ModelError(
                f"'{nl}' and '{al}' have different mean models; REML likelihoods are comparable "
                "only for the same fixed effects — refit both by ML (method='ml') to test mean terms")
        if not same_cov:
            raise ModelError(f"'{nl}' and '{al}' differ in both the mean model and the covariance "
                             "structure; test one change at a time")
        extra = set(alt_fit.names) - set(null_fit.names)
        if not set(null_fit.names) < set(alt_fit.names):
            raise ModelError(f"the terms of '{nl}' are not a subset of those of '{al}'; "
                             "the mean models are not nested")
        _check_correlation(null_fit, alt_fit, nl, al)
        T = _statistic(null_fit, alt_fit)
        df = len(extra)
        p = float(stats.chi2.sf(T, df))
        return LRTResult(nl, al, "mean", T, df, p, p, None, 0, method,
                         f"χ²({df}) (ML fits; tests {sorted(extra)})")
    if same_cov:
        raise ModelError(f"'{nl}' and '{al}' are the same model; nothing to test")
    nest = nesting(null_fit.structure, alt_fit.structure)
    if nest is None:
        rev = nesting(alt_fit.structure, null_fit.structure)
        hint = (f"; swap them: '{alt_fit.structure}' is the simpler one" if rev else
                "; compare them by AIC/BIC instead")
        raise ModelError(f"structure '{null_fit.structure}' is not nested in "
                         f"'{alt_fit.structure}'{hint}")
    _check_correlation(null_fit, alt_fit, nl, al)
    T = _statistic(null_fit, alt_fit)
    p_naive = float(stats.chi2.sf(T, nest.df))
    if nest.mixture is not None:
        p = mixture_sf(T, nest.mixture)
        ref = (" + ".join(f"{w:g}·χ²({k})" for w, k in nest.mixture) + f"; {nest.note}")
    else:
        p = p_naive
        ref = f"χ²({nest.df}); {nest.note}"
    return LRTResult(nl, al, "covariance", T, nest.df, p, p_naive, nest.mixture,
                     nest.n_boundary, method, ref)


def nested_pairs(fits, *, labels=None) -> list[tuple[int, int]]:
    """Index pairs (null, alt) of fits whose covariance structures are nested.

    Only fits with the same method, mean model, data and (when both are serial)
    correlation function are paired.
    """
    out = []
    for i, a in enumerate(fits):
        for j, b in enumerate(fits):
            if i == j or nesting(a.structure, b.structure) is None:
                continue
            if (a.method != b.method or tuple(a.names) != tuple(b.names)
                    or a.n_obs != b.n_obs or not _same_correlation(a, b)):
                continue
            out.append((i, j))
    return out


def comparison_table(fits, *, labels=None) -> pd.DataFrame:
    """Information criteria of several fits side by side.

    Parameters
    ----------
    fits : sequence of fits
    labels : sequence of str, optional
        Model names (default ``fit.label`` or the structure).

    Returns
    -------
    DataFrame
        Columns model, structure, method, n_params, loglik, aic, bic,
        delta_aic, delta_bic (difference from the smallest value among
        converged fits, or among all fits if none converged), converged,
        boundary (notes joined by "; "). ``df.attrs["warning"]`` holds a
        caution (or None) when the comparison is questionable, e.g. REML fits
        with different mean models.

    Notes
    -----
    AIC = −2ℓ + 2·n_params; BIC = −2ℓ + log(m)·n_params, m subjects
    (as computed by the fits). Smaller is better.
    """
    fits = list(fits)
    if labels is None:
        labels = [_label(f) for f in fits]
    labels = list(labels)
    if len(labels) != len(fits):
        raise ModelError(f"{len(labels)} labels given for {len(fits)} fits")
    rows = []
    for lab, f in zip(labels, fits):
        rows.append({"model": lab, "structure": f.structure, "method": f.method,
                     "n_params": int(f.n_params), "loglik": float(f.loglik),
                     "aic": float(f.aic), "bic": float(f.bic),
                     "converged": bool(f.converged), "boundary": "; ".join(f.boundary)})
    df = pd.DataFrame(rows, columns=[c for c in COLUMNS if c not in ("delta_aic", "delta_bic")])
    if len(df):
        ok = df["converged"].to_numpy(bool)
        base = ok if ok.any() else np.ones(len(df), bool)
        for c in ("aic", "bic"):
            v = df[c].to_numpy(float)
            ref = np.nanmin(np.where(base, v, np.nan)) if np.isfinite(v[base]).any() else np.nan
            df[f"delta_{c}"] = v - ref
    else:
        df["delta_aic"] = pd.Series(dtype=float)
        df["delta_bic"] = pd.Series(dtype=float)
    df = df[list(COLUMNS)]
    df.attrs["warning"] = comparison_warning(fits)
    return df


def comparison_warning(fits) -> str | None:
    """A caution about comparing these fits by likelihood, or None.

    Flags REML fits with different mean models, mixed REML/ML fits and fits to
    different data (different numbers of visits).
    """
    fits = list(fits)
    msgs = []
    methods = {f.method for f in fits}
    if len(methods) > 1:
        msgs.append("the fits mix REML and ML; their likelihoods and criteria are not comparable")
    reml_means = {tuple(f.names) for f in fits if f.method == "reml"}
    if len(reml_means) > 1:
        msgs.append("REML fits with different mean models are compared; REML likelihoods compare "
                    "only models with the same fixed effects — refit by ML to compare mean models")
    if len({f.n_obs for f in fits}) > 1:
        msgs.append("the fits use different numbers of visits (different data); "
                    "their criteria are not comparable")
    return "; ".join(msgs) if msgs else None


# --------------------------------------------------------------------------- helpers
def _statistic(null_fit, alt_fit) -> float:
    T = 2.0 * (float(alt_fit.loglik) - float(null_fit.loglik))
    # a richer model cannot fit worse at the optimum; small negatives are optimiser noise
    return max(T, 0.0)


def _has_serial(f) -> bool:
    from .mixed.structures import spec_for

    try:
        return spec_for(f.structure).serial
    except ModelError:
        return f.correlation is not None


def _same_correlation(a, b) -> bool:
    return not (_has_serial(a) and _has_serial(b)) or a.correlation == b.correlation


def _check_correlation(a, b, la, lb):
    if not _same_correlation(a, b):
        raise ModelError(f"'{la}' uses a {a.correlation} and '{lb}' a {b.correlation} serial "
                         "correlation; these are not nested — compare them by AIC/BIC")


def _label(f) -> str:
    return str(getattr(f, "label", None) or f.structure)
