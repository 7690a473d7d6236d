"""Checking a fitted mixed model: decorrelated residuals, predicted random effects, one subject.

For a :class:`~analysis.models.mixed.MixedFit` (one candidate of a
:class:`~analysis.models.modelling.ModelSet`):

* **standardised (decorrelated) residuals** r*ᵢ = Lᵢ⁻¹(yᵢ − Xᵢβ̂), with V̂ᵢ = LᵢLᵢᵀ the
  Cholesky factor of subject i's fitted marginal covariance. Under the model they are
  independent N(0, 1) (Fitzmaurice, Laird & Ware, 2011, §10.5; Houseman, Ryan & Coull,
  2004), so plotted against the fitted values Xᵢβ̂ or against time they should scatter
  evenly about 0, and their normal quantile plot should follow the diagonal;
* **predicted random effects** (BLUPs) b̂ᵢ = G Zᵢᵀ V̂ᵢ⁻¹(yᵢ − Xᵢβ̂), with their normal scores;
  shrunk towards 0, so their spread is smaller than G's — the quantile plot checks their
  shape, not their scale;
* for every visit, the **population prediction** Xᵢβ̂, the **subject's own prediction**
  Xᵢβ̂ + Zᵢb̂ᵢ and, for structures with a serial process, that plus the predicted serial
  component Ŵᵢ = σ̂²Rᵢ V̂ᵢ⁻¹(yᵢ − Xᵢβ̂) at the visit times.

Every quantity is computed per visit-count group of subjects as one stacked array (the
engine's :func:`~analysis.models.mixed.likelihood.build_groups`), never per subject.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy import stats

from ..errors import ModelError
from .mixed.likelihood import covariance_stack
from .mixed.structures import components, correlation_function

#: Plotting positions of the normal scores, (rank − a)/(n + 1 − 2a) with a = 3/8 (Blom, 1958;
#: common practice for normal quantile plots).
BLOM_A = 0.375
#: Names of the random effects in the order of Zᵢ's columns.
EFFECT_NAMES = ("intercept", "slope")


def normal_scores(values) -> np.ndarray:
    """Expected standard-normal quantile of each value's rank (Blom plotting positions).

    NaN values get NaN and are left out of the ranking; ties get their average rank.
    """
    v = np.asarray(values, dtype=float)
    out = np.full(v.shape, np.nan)
    ok = np.isfinite(v)
    n = int(ok.sum())
    if n:
        rank = stats.rankdata(v[ok])
        out[ok] = stats.norm.ppf((rank - BLOM_A) / (n + 1 - 2 * BLOM_A))
    return out


def quartile_line(values) -> tuple[float, float]:
    """(intercept, slope) of the line through the first and third quartiles of ``values``
    against those of the standard normal (the usual reference line of a quantile plot;
    common practice: it is not pulled by a few extreme values)."""
    v = np.asarray(values, dtype=float)
    v = v[np.isfinite(v)]
    if v.size < 2:
        return float("nan"), float("nan")
    q1, q3 = np.quantile(v, [0.25, 0.75])
    z1, z3 = stats.norm.ppf([0.25, 0.75])
    slope = (q3 - q1) / (z3 - z1)
    return float(q1 - slope * z1), float(slope)


@dataclass(frozen=True, eq=False)
class ModelChecks:
    """Residuals and predictions of one fitted model, for checking it.

    Attributes
    ----------
    model : str
        Name of the checked model (as in the comparison table).
    visits : DataFrame
        One row per visit in panel order: ``subject`` (the id as text), ``time``,
        ``response``, ``fitted`` (population, Xβ̂), ``residual`` (y − Xβ̂),
        ``standardised`` (decorrelated residual), ``score`` (its normal score),
        ``subject_fitted`` (Xβ̂ + Zb̂), ``serial_fitted`` (that plus the predicted serial
        component; NaN without a serial process).
    effects : DataFrame
        One row per subject: ``subject`` and, per random effect of the structure,
        ``intercept`` / ``slope`` (predicted deviation; the slope per time unit) with its
        normal score ``intercept_score`` / ``slope_score``. Only ``subject`` without
        random effects.
    effect_names : tuple of str
        The random effects present ("intercept", "slope").
    serial : bool
        Whether the structure has a serial process (``serial_fitted`` is filled).
    """

    model: str
    visits: pd.DataFrame
    effects: pd.DataFrame
    effect_names: tuple
    serial: bool

    @property
    def n_subjects(self) -> int:
        return int(len(self.effects))

    @property
    def n_obs(self) -> int:
        return int(len(self.visits))

    def to_frame(self) -> pd.DataFrame:
        """The per-visit table."""
        return self.visits

    def subject(self, subject) -> pd.DataFrame:
        """The visits of one subject (id compared as text), empty when not in the fit."""
        return self.visits[self.visits["subject"] == str(subject)]

    def summary(self) -> dict:
        """Mean and SD of the standardised residuals (≈ 0 and 1 under the model) and counts."""
        r = self.visits["standardised"].to_numpy(float)
        return {"model": self.model, "n_obs": self.n_obs, "n_subjects": self.n_subjects,
                "mean": float(np.mean(r)), "sd": float(np.std(r, ddof=1)) if r.size > 1
                else float("nan"),
                "beyond_2": int(np.sum(np.abs(r) > 2))}


def serial_prediction(fit) -> np.ndarray:
    """Predicted serial component Ŵᵢ = σ̂²Rᵢ V̂ᵢ⁻¹(yᵢ − Xᵢβ̂) at every visit, panel row order.

    Zeros when the structure has no serial process.
    """
    it = fit.internals
    out = np.zeros(fit.n_obs)
    if not it.spec.serial:
        return out
    comp = components(it.spec, it.theta)
    shape = fit.correlation or "exponential"
    beta = np.asarray(fit.beta)
    for g in it.groups:
        V = covariance_stack(g, comp, shape)
        a = np.linalg.solve(V, (g.y - g.X @ beta)[:, :, None])
        R = comp.serial_var * correlation_function(g.lag, comp.range, shape)
        out[g.rows] = (R @ a)[:, :, 0]
    return out


def model_checks(fit, *, name: str | None = None, subject_ids=None) -> ModelChecks:
    """Residuals, predicted random effects and predictions of a fitted mixed model.

    Parameters
    ----------
    fit : MixedFit
        A fit with its internals (as returned by :func:`~analysis.models.mixed.fit_mixed`).
    name : str, optional
        Model name for titles (default ``fit.label``).
    subject_ids : array_like, optional
        Id of each panel subject (panel code order); default the codes.

    Returns
    -------
    ModelChecks

    Raises
    ------
    ModelError
        The fit carries no internals (e.g. it was read back from JSON) or the ids do not
        match its subjects.
    """
    it = getattr(fit, "internals", None)
    if it is None:
        raise ModelError("this fit keeps no data to check it against; refit the models")
    panel = it.panel
    X = getattr(it, "X", None)
    if X is None or np.ndim(X) != 2 or X.shape[0] != getattr(panel, "n_obs", -1):
        raise ModelError("the fit's visits are not held in memory (e.g. they stay on a "
                         "cluster's workers), so its residuals cannot be checked here")
    m = panel.n_subjects
    ids = np.arange(m) if subject_ids is None else np.asarray(subject_ids)
    if ids.shape[0] != m:
        raise ModelError(f"{ids.shape[0]} subject ids given for a fit of {m} subjects")
    ids = pd.Series(ids).astype(str).to_numpy(dtype=object)
    beta = np.asarray(fit.beta)
    fitted = it.X @ beta
    std = fit.standardized_residuals()
    q = it.spec.n_random
    names = EFFECT_NAMES[:q]
    b = fit.blups()
    effects = {"subject": ids}
    subject_fitted = fitted.copy()
    codes = panel.codes
    for j, nm in enumerate(names):
        col = b[f"b{j}"].to_numpy(float)
        effects[nm] = col
        effects[f"{nm}_score"] = normal_scores(col)
        subject_fitted += col[codes] * (1.0 if j == 0 else panel.time)
    serial = bool(it.spec.serial)
    visits = pd.DataFrame({
        "subject": ids[codes], "time": panel.time, "response": panel.y, "fitted": fitted,
        "residual": panel.y - fitted, "standardised": std, "score": normal_scores(std),
        "subject_fitted": subject_fitted,
        "serial_fitted": subject_fitted + serial_prediction(fit) if serial
        else np.full(panel.n_obs, np.nan),
    })
    return ModelChecks(model=name or fit.label, visits=visits, effects=pd.DataFrame(effects),
                       effect_names=names, serial=serial)


def fitted_subject_ids(cohort, models) -> np.ndarray:
    """Ids of the subjects a model set was fitted to, in its panel order.

    ``fit_candidates`` drops subjects lacking a value the mean model uses; the same rule
    (:func:`~analysis.models.mean_model.complete_subjects`) picks the ids kept.
    """
    from .mean_model import complete_subjects
    from .modelling import COVARIATE_COLUMN

    ids = np.asarray(cohort.subject_ids)
    baseline = cohort.baseline.reset_index(drop=True)
    keep = complete_subjects(baseline, models.mean, covariate_name=COVARIATE_COLUMN)
    kept = ids[np.asarray(keep, dtype=bool)]
    if kept.size != models.n_subjects:
        raise ModelError(f"{kept.size} subjects have every value the mean model uses but the "
                         f"models were fitted to {models.n_subjects}; refit the models")
    return kept


def checks_for(cohort, models, model: str | None = None) -> ModelChecks:
    """:func:`model_checks` of one model of a fitted set (default: the preferred one)."""
    fits = models.fits
    if not fits:
        raise ModelError("no model was fitted, so there is nothing to check")
    if model not in fits:
        model = models.preferred if models.preferred in fits else next(iter(fits))
    return model_checks(fits[model], name=model, subject_ids=fitted_subject_ids(cohort, models))


def thin_rows(n: int, limit: int, *, seed: int = 1, keep=()) -> np.ndarray:
    """Sorted row indices of a reproducible random sample of at most ``limit`` of ``n`` rows.

    All rows when ``n <= limit``. Rows in ``keep`` (e.g. a highlighted subject's) are
    always included on top of the sample.
    """
    if n <= limit:
        return np.arange(n)
    rng = np.random.default_rng(seed)
    pick = rng.choice(n, size=limit, replace=False)
    return np.union1d(pick, np.asarray(keep, dtype=int))


def thin_quantiles(scores, limit: int, *, tail: int = 25) -> np.ndarray:
    """Row indices of a quantile plot kept when thinning: evenly spaced in rank, plus the
    ``tail`` most extreme at each end (where a quantile plot is read)."""
    s = np.asarray(scores, dtype=float)
    order = np.argsort(s, kind="stable")
    order = order[np.isfinite(s[order])]
    n = order.size
    if n <= limit:
        return order
    inner = np.linspace(0, n - 1, max(limit - 2 * tail, 2)).round().astype(int)
    pos = np.unique(np.r_[np.arange(tail), inner, np.arange(n - tail, n)])
    return order[pos]
