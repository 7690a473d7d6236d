"""Marginal (GEE) fits of the mean model as a robustness check on the mixed models.

Generalised estimating equations with a Gaussian family and identity link
give the population-average regression of the response on the design; the
sandwich (robust) standard errors stay valid whatever the true within-subject
covariance, so agreement with the mixed-model estimates says the conclusion
does not hinge on the chosen covariance structure.
"""
from __future__ import annotations

import warnings
from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy import stats

from ..confidence import t_quantile
from ..errors import ModelError
from ..preparation.panel import Panel
from ..jsonsafe import json_float

#: Working correlation structures offered.
WORKING: tuple[str, ...] = ("exchangeable", "autoregressive", "independence")



@dataclass(frozen=True, eq=False)
class GEEFit:
    """A GEE fit (Gaussian family, identity link).

    Attributes
    ----------
    working : str
        Working correlation: "exchangeable", "autoregressive" or "independence".
    names : tuple of str
        Term names.
    beta : ndarray (p,)
    robust_cov_beta : ndarray (p, p)
        Sandwich covariance clustered by subject (Liang & Zeger, 1986) with the
        Mancl–DeRouen (2001) bias reduction (statsmodels ``cov_type="bias_reduced"``).
    naive_cov_beta : ndarray (p, p)
        Model-based covariance under the working correlation.
    working_params : dict
        "correlation" (exchangeable: common within-subject correlation;
        autoregressive: correlation at a lag of one time unit, so ρ(u) = α^u)
        and "scale" (residual variance). Independence has only "scale".
    n_subjects, n_obs : int
    converged : bool
    message : str
        Warnings raised while fitting (empty if none).

    Notes
    -----
    Intervals and p-values refer the Wald statistic to Student's t with
    subjects − p degrees of freedom (:attr:`robust_df`).
    """

    working: str
    names: tuple
    beta: np.ndarray
    robust_cov_beta: np.ndarray
    naive_cov_beta: np.ndarray
    working_params: dict
    n_subjects: int
    n_obs: int
    converged: bool
    message: str = ""

    @property
    def label(self) -> str:
        """Display name, e.g. "GEE (exchangeable)"."""
        return f"GEE ({self.working})"

    @property
    def robust_df(self) -> float:
        """Degrees of freedom of the robust t statistics: subjects − p (at least 1)."""
        return float(max(self.n_subjects - len(self.names), 1))

    def fixed_frame(self) -> pd.DataFrame:
        """Estimates with bias-reduced robust SEs, 95% t intervals and two-sided p-values.

        Returns
        -------
        DataFrame
            Columns term, estimate, robust_se, df, lo, hi, z, p, naive_se.
        """
        est = np.asarray(self.beta, float)
        rse = np.sqrt(np.diag(self.robust_cov_beta))
        df = self.robust_df
        q = t_quantile(df)
        with np.errstate(divide="ignore", invalid="ignore"):
            z = est / rse
        return pd.DataFrame({
            "term": list(self.names), "estimate": est, "robust_se": rse,
            "df": np.full(est.size, df),
            "lo": est - q * rse, "hi": est + q * rse, "z": z,
            "p": 2 * stats.t.sf(np.abs(z), df),
            "naive_se": np.sqrt(np.diag(self.naive_cov_beta)),
        })

    def to_frame(self) -> pd.DataFrame:
        """Same as :meth:`fixed_frame`."""
        return self.fixed_frame()

    def to_json(self) -> dict:
        """Plain dict: name, working, fixed (term, estimate, robust_se, lo, hi, p), working_params."""
        ff = self.fixed_frame()
        fixed = [{"term": str(r["term"]), **{k: json_float(r[k]) for k in
                                              ("estimate", "robust_se", "df", "lo", "hi", "p")}}
                 for r in ff.to_dict("records")]
        return {"name": self.label, "working": self.working, "fixed": fixed,
                "working_params": {k: json_float(v) for k, v in self.working_params.items()},
                "n_subjects": int(self.n_subjects), "n_obs": int(self.n_obs),
                "converged": bool(self.converged), "message": self.message}


def gee_fit(panel: Panel, X, *, names, working: str = "exchangeable",
            maxiter: int = 100) -> GEEFit:
    """Fit the mean model by GEE with a working correlation and robust SEs.

    Parameters
    ----------
    panel : Panel
        Response, time and subject grouping (rows sorted by subject, time).
    X : ndarray (n_obs, p)
        Design in panel row order.
    names : sequence of str
        Term names.
    working : {"exchangeable", "autoregressive", "independence"}
    maxiter : int
        Iteration limit of the estimating-equation solver.

    Returns
    -------
    GEEFit

    Raises
    ------
    ModelError
        Unknown working structure, mismatched shapes, non-finite values,
        or a failure inside the solver.

    Notes
    -----
    Uses ``statsmodels.genmod.generalized_estimating_equations.GEE`` with
    the Gaussian family and ``cov_type="bias_reduced"`` (Mancl & DeRouen, 2001:
    each subject's residuals are corrected by its block of the hat matrix
    before they enter the sandwich). For "autoregressive" the
    visit times are passed as the ``time`` argument and the structure is
    built with ``Autoregressive(grid=False)``, so corr(Y_ij, Y_ik) =
    α^|t_ij − t_ik| uses the actual (irregular) time gaps and α is estimated
    from all within-subject pairs, not only from neighbouring grid points
    (Rosner & Muñoz, 1988). α is therefore the correlation at a gap of one
    time unit. statsmodels 0.14–0.15 estimates α from time gaps but then
    builds the working matrix from visit *positions* (α^|j − k|); the
    subclass used here builds it from the time gaps as well, so the working
    correlation is the continuous-time AR(1) (exponential) one. With equally
    spaced unit gaps both coincide.

    References
    ----------
    Liang & Zeger (1986), Biometrika 73, 13–22.
    Diggle, Heagerty, Liang & Zeger (2002), ch. 8.
    """
    from statsmodels.genmod import cov_struct as cs
    from statsmodels.genmod import families
    from statsmodels.genmod.generalized_estimating_equations import GEE

    if working not in WORKING:
        raise ModelError(f"working == {working!r}, must be one of {list(WORKING)}")
    X = np.asarray(X, dtype=float)
    if X.ndim == 1:
        X = X[:, None]
    names = tuple(str(n) for n in names)
    if X.shape[0] != panel.n_obs:
        raise ModelError(f"design has {X.shape[0]} rows but the panel has {panel.n_obs} visits")
    if len(names) != X.shape[1]:
        raise ModelError(f"{len(names)} term names given for {X.shape[1]} design columns")
    if not np.isfinite(X).all() or not np.isfinite(panel.y).all():
        raise ModelError("design or response has missing or non-finite values; "
                         "drop those subjects or visits before the GEE fit")
    if panel.n_subjects < 2:
        raise ModelError(f"GEE needs at least 2 subjects for robust SEs; the data have "
                         f"{panel.n_subjects}")
    kwargs = {}
    if working == "exchangeable":
        struct = cs.Exchangeable()
    elif working == "autoregressive":
        struct = _time_gap_autoregressive()
        kwargs["time"] = panel.time[:, None]
    else:
        struct = cs.Independence()
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        try:
            model = GEE(panel.y, X, groups=panel.codes, family=families.Gaussian(),
                        cov_struct=struct, **kwargs)
            res = model.fit(maxiter=int(maxiter), cov_type="bias_reduced")
        except (np.linalg.LinAlgError, ValueError) as exc:
            hint = ""
            if "bracket" in str(exc):
                hint = ("; the correlation at one time unit is estimated at the edge (1): the "
                        "data look more like an exchangeable (random-intercept-like) pattern")
            raise ModelError(f"GEE ({working}) failed: {exc}{hint}") from exc
    msgs = [str(w.message) for w in caught
            if not issubclass(w.category, (DeprecationWarning, FutureWarning))]
    if getattr(struct, "at_bound", False):
        msgs.append(f"the autoregressive correlation at one time unit reached its bound "
                    f"({AR_MAX}): correlation hardly decays with the time gap, so an exchangeable "
                    "working correlation describes these data better")
    converged = not any("converge" in m.lower() for m in msgs)
    params = {"scale": float(res.scale)}
    if working != "independence":
        dep = np.atleast_1d(np.asarray(struct.dep_params, dtype=float))
        params = {"correlation": float(dep[0]), **params}
    return GEEFit(
        working=working, names=names, beta=np.asarray(res.params, float),
        robust_cov_beta=np.asarray(res.cov_robust_bc, float),
        naive_cov_beta=np.asarray(res.cov_naive, float), working_params=params,
        n_subjects=panel.n_subjects, n_obs=panel.n_obs, converged=converged,
        message="; ".join(dict.fromkeys(msgs)),
    )


#: Upper bound of the autoregressive working parameter α (the fit is bounded, not bracketed).
AR_MAX = 0.999


def _time_gap_autoregressive():
    """statsmodels ``Autoregressive(grid=False)`` using time gaps for both α and the working matrix.

    α minimises the weighted least-squares criterion of statsmodels'
    ``Autoregressive`` (standardised residual r_j regressed on α^d r_k over all
    within-subject pairs, d the time gap, weights from the current α) but over the bounded interval
    [0, :data:`AR_MAX`] instead of a bracket search, so a correlation that does
    not decay with the gap gives α at the bound (noted) rather than an error.
    """
    from scipy.optimize import minimize_scalar
    from statsmodels.genmod import cov_struct as cs

    class TimeGapAutoregressive(cs.Autoregressive):
        at_bound = False
        _pairs = None

        def _pair_index(self):
            if self._pairs is None:
                sizes = [len(e) for e in self.model.endog_li]
                offs = np.concatenate(([0], np.cumsum(sizes)[:-1]))
                i1, i2 = [], []
                for n in sorted(set(sizes)):
                    a, b = np.tril_indices(n, -1)
                    o = offs[np.asarray(sizes) == n]
                    i1.append((o[:, None] + a).ravel())
                    i2.append((o[:, None] + b).ravel())
                i1 = np.concatenate(i1).astype(np.int64)
                i2 = np.concatenate(i2).astype(np.int64)
                t = np.concatenate([np.asarray(x, float)[:, 0] for x in self.model.time_li])
                self._pairs = (i1, i2, np.abs(t[i1] - t[i2]))
            return self._pairs

        def update(self, params):
            i1, i2, d = self._pair_index()
            if i1.size == 0:
                self.dep_params = 0.0
                return
            scale = self.model.estimate_scale()
            resid = np.concatenate([
                (e - cm[0]) / np.sqrt(scale * self.model.family.variance(cm[0]))
                for e, cm in zip(self.model.endog_li, self.model.cached_means)])
            r1, r2 = resid[i1], resid[i2]
            # weights 1/var(r1 - a^d r2) at the current α, held fixed while minimising (as statsmodels)
            a0 = float(self.dep_params)
            w = (1.0 - a0 * a0) / np.maximum(1.0 - a0 ** (2 * d), 1e-12)
            w = w / w.sum()

            def crit(a):
                return float(np.dot(w, (r1 - a ** d * r2) ** 2))

            res = minimize_scalar(crit, bounds=(0.0, AR_MAX), method="bounded",
                                  options={"xatol": 1e-8})
            a = float(res.x)
            self.at_bound = a > AR_MAX - 1e-4
            self.dep_params = a

        def covariance_matrix(self, endog_expval, index):
            alpha = float(self.dep_params)
            n = len(endog_expval)
            if alpha == 0:
                return np.eye(n, dtype=np.float64), True
            t = np.asarray(self.model.time_li[index], dtype=float)
            gap = np.abs(t[:, None, :] - t[None, :, :]).sum(axis=2)
            return alpha ** gap, True

        # the parent's banded solver assumes unit index gaps; use the generic dense solve
        covariance_matrix_solve = cs.CovStruct.covariance_matrix_solve

        def summary(self):
            return (f"Autoregressive in time gaps: correlation {float(self.dep_params):.4f} "
                    "at one time unit")

    return TimeGapAutoregressive(grid=False)
