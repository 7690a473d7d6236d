"""The frozen result of a mixed-model fit and its tidy tables."""
from __future__ import annotations

from dataclasses import dataclass, field
from functools import cached_property

import numpy as np
import pandas as pd
from scipy import stats

from ...confidence import t_quantile
from .structures import StructureSpec, components, correlation_function

#: Below this many subjects the page and the report say that the intervals rest on
#: small-sample corrections (common practice: sandwich and large-sample Wald
#: intervals are known to be too narrow with a few dozen clusters or fewer).
SMALL_COHORT = 30

#: How the p-values and intervals of the fixed effects are referred.
REFERENCE_TEXT = ("Wald t tests and intervals: model-based with Satterthwaite degrees of freedom "
                  "(from the observed information of the variance parameters); robust with the "
                  "Mancl–DeRouen bias-reduced sandwich and subjects − p degrees of freedom")


@dataclass(frozen=True, eq=False)
class FitInternals:
    """What a fit keeps to compute derived quantities (not part of the public contract).

    ``data`` is what the likelihood was evaluated on: dense per-visit-count
    groups, or per-subject sums (structures without a serial process), in
    which case :attr:`groups` builds the dense stacks on first use.
    """

    panel: object
    X: np.ndarray
    spec: StructureSpec
    theta: np.ndarray
    time_scale: float
    data: object

    @cached_property
    def groups(self) -> list:
        """Dense per-visit-count groups (for subject-level quantities)."""
        if isinstance(self.data, list):
            return self.data
        from .likelihood import build_groups
        return build_groups(self.panel, self.X, self.spec, self.time_scale)


@dataclass(frozen=True, eq=False)
class MixedFit:
    """A fitted linear mixed model.

    Attributes
    ----------
    structure : str
        Working covariance structure (see :data:`analysis.models.mixed.STRUCTURES`).
    correlation : str or None
        Serial correlation function, None when the structure has no serial part.
    method : {"reml", "ml"}
    names : tuple of str
        Fixed-effect term names.
    beta : ndarray (p,)
        GLS fixed effects at the estimated covariance.
    cov_beta : ndarray (p, p)
        Model-based covariance (Σ XᵢᵀV̂ᵢ⁻¹Xᵢ)⁻¹.
    robust_cov_beta : ndarray (p, p)
        Sandwich (empirical) covariance clustered by subject with the
        Mancl–DeRouen small-sample correction,
        M⁻¹ [Σ XᵢᵀV̂ᵢ⁻¹ r̃ᵢ r̃ᵢᵀ V̂ᵢ⁻¹ Xᵢ] M⁻¹ with M = Σ XᵢᵀV̂ᵢ⁻¹Xᵢ,
        r̃ᵢ = (I − Hᵢᵢ)⁻¹(yᵢ − Xᵢβ̂) and Hᵢᵢ = XᵢM⁻¹XᵢᵀV̂ᵢ⁻¹ (Liang & Zeger, 1986;
        Mancl & DeRouen, 2001).
    variance : dict
        Natural-scale variance parameters present in the structure:
        "intercept_var", "slope_var", "intercept_slope_cov", "serial_var",
        "range" (in time units), "error_var". Slope terms are per time unit.
    variance_ci : dict
        95% Wald intervals (lo, hi): computed on the log scale for variances
        and range (so always positive), on the natural scale for the
        covariance, from a finite-difference Hessian of the profiled (RE)ML
        log-likelihood restricted to the parameters not at the boundary. A
        variance at the boundary gets (0, NaN): one-sided, its lower limit is 0.
        NaN when the interior information is not positive definite.
    loglik : float
        Maximised log-likelihood (REML or ML; statsmodels ``MixedLM`` convention,
        = −½ × lme4's REML criterion / deviance).
    n_params : int
        p + number of variance parameters.
    aic, bic : float
        −2ℓ + 2·n_params and −2ℓ + log(n_subjects)·n_params. BIC uses the
        number of subjects, not of observations (conventions differ: some
        software uses N observations or N − p under REML).
    converged : bool
    iterations : int
    boundary : tuple of str
        Notes on estimates at or near the edge of the parameter space.
    at_boundary : tuple of str
        Variance parameters at the boundary of the parameter space (or not
        identified because of one that is); see ``boundary`` for the notes.
    df : ndarray (p,)
        Satterthwaite degrees of freedom of each model-based Wald t statistic.
    robust_df : float
        Degrees of freedom of the robust t statistics: subjects − p.
    n_subjects, n_obs : int
    message : str
        Optimiser message.
    reference : str
        How p-values and intervals are referred.
    """

    structure: str
    correlation: str | None
    method: str
    names: tuple
    beta: np.ndarray
    cov_beta: np.ndarray
    robust_cov_beta: np.ndarray
    variance: dict
    variance_ci: dict
    loglik: float
    n_params: int
    aic: float
    bic: float
    converged: bool
    iterations: int
    boundary: tuple
    at_boundary: tuple
    df: np.ndarray
    robust_df: float
    n_subjects: int
    n_obs: int
    message: str
    reference: str = REFERENCE_TEXT
    internals: FitInternals | None = field(default=None, repr=False, compare=False)

    # ------------------------------------------------------------------ tables
    @property
    def label(self) -> str:
        """Display name, e.g. "intercept+serial (exponential), REML"."""
        corr = f" ({self.correlation})" if self.correlation else ""
        return f"{self.structure}{corr}, {self.method.upper()}"

    def fixed_frame(self) -> pd.DataFrame:
        """Fixed effects with model-based and robust SEs, 95% intervals and Wald t tests.

        Returns
        -------
        DataFrame
            Columns term, estimate, se, robust_se, df, robust_df, lo, hi,
            robust_lo, robust_hi, z, p, robust_z, robust_p. ``z`` is the Wald
            statistic estimate/SE, referred to Student's t with ``df``
            (Satterthwaite) or ``robust_df`` (subjects − p) degrees of freedom
            for the two-sided p-value and the interval.
        """
        est = np.asarray(self.beta, dtype=float)
        se = np.sqrt(np.diag(self.cov_beta))
        rse = np.sqrt(np.diag(self.robust_cov_beta))
        df = np.asarray(self.df, dtype=float)
        rdf = np.full(est.size, float(self.robust_df))
        # a NaN df (information not available) falls back to subjects − p
        df_used = np.where(np.isfinite(df) | (df == np.inf), df, rdf)
        q, rq = t_quantile(df_used), t_quantile(rdf)
        with np.errstate(divide="ignore", invalid="ignore"):
            z, rz = est / se, est / rse
        return pd.DataFrame({
            "term": list(self.names),
            "estimate": est,
            "se": se,
            "robust_se": rse,
            "df": df_used,
            "robust_df": rdf,
            "lo": est - q * se,
            "hi": est + q * se,
            "robust_lo": est - rq * rse,
            "robust_hi": est + rq * rse,
            "z": z,
            "p": 2 * stats.t.sf(np.abs(z), df_used),
            "robust_z": rz,
            "robust_p": 2 * stats.t.sf(np.abs(rz), rdf),
        })

    def to_frame(self) -> pd.DataFrame:
        """Same as :meth:`fixed_frame`."""
        return self.fixed_frame()

    def variance_frame(self) -> pd.DataFrame:
        """Variance parameters with 95% Wald intervals and boundary notes.

        Returns
        -------
        DataFrame
            Columns parameter, estimate, lo, hi, note.
        """
        rows = []
        for k, v in self.variance.items():
            lo, hi = self.variance_ci.get(k, (np.nan, np.nan))
            note = "; ".join(n for n in self.boundary if n.startswith(k) or f" {k}" in n)
            if k in self.at_boundary and not note:
                note = f"{k} is not identified because another parameter is at the boundary"
            rows.append({"parameter": k, "estimate": v, "lo": lo, "hi": hi, "note": note})
        return pd.DataFrame(rows, columns=["parameter", "estimate", "lo", "hi", "note"])

    def to_json(self) -> dict:
        """Plain-dict summary (JSON-serialisable)."""
        ff = self.fixed_frame()
        fixed = [{k: (None if isinstance(v, float) and not np.isfinite(v) else
                      (str(v) if k == "term" else float(v)))
                  for k, v in row.items()} for row in ff.to_dict("records")]
        var = {}
        for k, v in self.variance.items():
            lo, hi = self.variance_ci.get(k, (np.nan, np.nan))
            var[k] = {"estimate": float(v),
                      "lo": float(lo) if np.isfinite(lo) else None,
                      "hi": float(hi) if np.isfinite(hi) else None,
                      "at_boundary": k in self.at_boundary}
        return {
            "name": self.label,
            "structure": self.structure,
            "correlation": self.correlation,
            "method": self.method,
            "loglik": float(self.loglik),
            "aic": float(self.aic),
            "bic": float(self.bic),
            "n_params": int(self.n_params),
            "n_subjects": int(self.n_subjects),
            "n_obs": int(self.n_obs),
            "converged": bool(self.converged),
            "fixed": fixed,
            "variance": var,
            "boundary": list(self.boundary),
            "reference": self.reference,
            "small_sample": self.n_subjects < SMALL_COHORT,
        }

    # ------------------------------------------------------------------ derived curves
    def variogram_curve(self, lags) -> np.ndarray:
        """Model-implied within-subject semivariogram of the residuals at ``lags``.

        Parameters
        ----------
        lags : array_like
            Time lags u >= 0 in the user's time units.

        Returns
        -------
        ndarray
            γ(u) = ½E[(Yᵢⱼ − Yᵢₖ)²] for |tᵢⱼ − tᵢₖ| = u, conditional on the
            mean: τ² + σ²(1 − ρ(u)) + ½·slope_var·u². The random intercept
            cancels in within-subject differences; the last term is present
            only with a random slope. At u = 0 the value is the limit from
            above (the nugget τ²), matching empirical variograms that exclude
            zero lags.

        Notes
        -----
        Diggle et al. (2002), §5.2, eq. (5.2.5).
        """
        u = np.abs(np.asarray(lags, dtype=float))
        v = self.variance
        g = np.full(u.shape, v["error_var"], dtype=float)
        if "serial_var" in v:
            g = g + v["serial_var"] * (1.0 - correlation_function(u, v["range"], self.correlation))
        if "slope_var" in v:
            g = g + 0.5 * v["slope_var"] * u**2
        return g

    def process_variance(self, at_time=None) -> float:
        """Marginal variance of one observation, τ² + σ² + z(t)ᵀGz(t).

        Parameters
        ----------
        at_time : float, optional
            Time t (user units) for z(t) = (1, t); default the mean visit time.

        Returns
        -------
        float
            Total variance (the sill of the semivariogram plus the between-subject part).
        """
        v = self.variance
        t = float(np.mean(self.internals.panel.time)) if at_time is None else float(at_time)
        out = v["error_var"] + v.get("serial_var", 0.0) + v.get("intercept_var", 0.0)
        if "slope_var" in v:
            out += 2 * t * v["intercept_slope_cov"] + t * t * v["slope_var"]
        return float(out)

    # ------------------------------------------------------------------ subject level
    def _per_group(self):
        it = self.internals
        from .likelihood import covariance_stack
        comp = components(it.spec, it.theta)
        for g in it.groups:
            V = covariance_stack(g, comp, self.correlation or "exponential")
            r = g.y - g.X @ np.asarray(self.beta)
            yield g, comp, V, r

    def blups(self) -> pd.DataFrame:
        """Predicted random effects b̂ᵢ = G Zᵢᵀ V̂ᵢ⁻¹ (yᵢ − Xᵢβ̂), one row per subject.

        Returns
        -------
        DataFrame
            Columns subject (panel subject code), b0 (intercept deviation),
            b1 (slope deviation per time unit). Columns absent from the
            structure are NaN.
        """
        it = self.internals
        m = it.panel.n_subjects
        b = np.full((m, 2), np.nan)
        if it.spec.n_random:
            for g, comp, V, r in self._per_group():
                a = np.linalg.solve(V, r[:, :, None])[:, :, 0]
                bi = np.einsum("ab,mib,mi->ma", comp.G, g.Z, a)
                b[g.subjects, : it.spec.n_random] = bi
            if it.spec.n_random == 2:
                b[:, 1] /= it.time_scale
        return pd.DataFrame({"subject": np.arange(m), "b0": b[:, 0], "b1": b[:, 1]})

    def standardized_residuals(self) -> np.ndarray:
        """Cholesky-whitened marginal residuals Lᵢ⁻¹(yᵢ − Xᵢβ̂), V̂ᵢ = LᵢLᵢᵀ, panel row order.

        Under the model these are independent N(0, 1) (Fitzmaurice, Laird & Ware,
        2011, §10.5), so their variogram should be flat at 1.
        """
        out = np.empty(self.n_obs)
        for g, comp, V, r in self._per_group():
            L = np.linalg.cholesky(V)
            e = np.linalg.solve(L, r[:, :, None])[:, :, 0]
            out[g.rows] = e
        return out
