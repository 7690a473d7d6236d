"""Fit a set of candidate covariance models to a prepared cohort and compare them.

This is the driver behind the CLI ``fit`` subcommand and the dashboard's
modelling view: one design, several working covariance structures, the
comparison table, likelihood-ratio tests for nested pairs, GEE robustness
rows and the plain-language time × covariate statement.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from ..jsonsafe import json_safe
from .compare import comparison_table, likelihood_ratio, nested_pairs
from .effects import InteractionSummary, interaction_summary
from ..errors import CohortError, ModelError
from .gee import WORKING, GEEFit, gee_fit
from .mean_model import Design, MeanModel, complete_subjects, design, used_columns
from .mixed.structures import default_structures, spec_for

#: Structures fitted by default (rows of the structures table marked ``default``):
#: random intercept; + random slope; + serial process; all three.
DEFAULT_CANDIDATES: tuple[str, ...] = default_structures()
#: GEE working correlations fitted beside the mixed models unless told otherwise.
DEFAULT_GEE: tuple[str, ...] = ("exchangeable", "autoregressive")
#: ``correlation`` value that fits every serial structure with each correlation shape.
BOTH = "both"
#: Baseline column of the transformed, centred primary covariate (set by ``prepare``).
COVARIATE_COLUMN = "x"


@dataclass(frozen=True, eq=False)
class Candidate:
    """One candidate model: its fit, or why it failed.

    Attributes
    ----------
    name : str
        e.g. "intercept+slope (REML)" or "intercept+serial (exponential, REML)".
    structure : str
    fit : MixedFit or None
    error : str or None
        Message of the failure when ``fit`` is None.
    """

    name: str
    structure: str
    fit: object | None
    error: str | None = None


@dataclass(frozen=True, eq=False)
class GEERow:
    """A GEE robustness fit or why it failed."""

    name: str
    working: str
    fit: GEEFit | None
    error: str | None = None


@dataclass(frozen=True, eq=False)
class ModelSet:
    """Everything :func:`fit_candidates` produced.

    Attributes
    ----------
    mean : MeanModel
        The mean model actually used (covariate terms switched off when the
        cohort has no numeric primary covariate).
    design : Design
    candidates : tuple of Candidate
    comparison : DataFrame
        :func:`analysis.models.compare.comparison_table` of the successful fits;
        ``attrs["warning"]`` carries a caution or None.
    lrts : tuple of LRTResult
        Tests of every nested pair among the successful candidates.
    gee : tuple of GEERow
    preferred : str or None
        Name of the preferred model: lowest AIC among converged fits (among all
        successful fits if none converged).
    effect : InteractionSummary or None
        Time × covariate reading from the preferred model (None without an interaction).
    notes : tuple of str
        What was dropped or changed and why.
    n_subjects, n_obs : int
        Size of the cohort the models were fitted to.
    n_dropped : int
        Subjects dropped for missing covariate values.
    """

    mean: MeanModel
    design: Design
    candidates: tuple
    comparison: pd.DataFrame
    lrts: tuple
    gee: tuple
    preferred: str | None
    effect: InteractionSummary | None
    notes: tuple
    n_subjects: int
    n_obs: int
    n_dropped: int
    method: str = "reml"
    correlation: str = "exponential"
    panel: object | None = None

    def mean_residuals(self) -> np.ndarray:
        """OLS residuals of the response on this set's fixed-effects design, panel row order."""
        X, y = self.design.X, self.panel.y
        beta = np.linalg.lstsq(X, y, rcond=None)[0]
        return y - X @ beta

    def residual_variogram(self, *, n_bins: int = 10, max_lag: float | None = None):
        """Empirical semivariogram of :meth:`mean_residuals` (like with like for the overlay).

        The fitted semivariograms describe the residuals about the models' own mean
        (the fixed-effects design), so the points they are drawn against come from
        the same mean model, fitted by OLS, not from the exploratory smooth trend.
        Computed by :func:`analysis.exploration.variogram.semivariogram`.
        """
        from ..exploration.variogram import semivariogram
        return semivariogram(self.panel.with_y(self.mean_residuals()), n_bins=n_bins,
                             max_lag=max_lag)

    @property
    def fits(self) -> dict:
        """Successful fits by name."""
        return {c.name: c.fit for c in self.candidates if c.fit is not None}

    def to_frame(self) -> pd.DataFrame:
        """The comparison table."""
        return self.comparison

    def fixed_frame(self) -> pd.DataFrame:
        """Fixed effects of every successful candidate and GEE row, with a ``model`` column."""
        parts = [c.fit.fixed_frame().assign(model=c.name) for c in self.candidates if c.fit]
        parts += [g.fit.fixed_frame().assign(model=g.name) for g in self.gee if g.fit]
        if not parts:
            return pd.DataFrame(columns=["model", "term", "estimate"])
        df = pd.concat(parts, ignore_index=True)
        return df[["model", *[c for c in df.columns if c != "model"]]]

    def to_json(self) -> dict:
        """Plain JSON-safe dict: models, comparison, lrt, gee, effect, mean_model, notes."""
        models = []
        for c in self.candidates:
            if c.fit is None:
                models.append({"name": c.name, "structure": c.structure, "method": self.method,
                               "error": c.error, "converged": False, "fixed": [],
                               "variance": {}})
                continue
            j = c.fit.to_json()
            j["label"] = j.get("name")
            j["name"] = c.name
            j["error"] = None
            models.append(j)
        comp = self.comparison.to_dict("records")
        return json_safe({
            "models": models,
            "comparison": comp,
            "comparison_warning": self.comparison.attrs.get("warning"),
            "lrt": [t.to_json() for t in self.lrts],
            "gee": [({**g.fit.to_json(), "error": None} if g.fit else
                     {"name": g.name, "working": g.working, "error": g.error, "fixed": []})
                    for g in self.gee],
            "preferred": self.preferred,
            "preferred_rule": "lowest AIC among converged fits",
            "effect": self.effect.to_json() if self.effect else None,
            "mean_model": {**self.mean.to_json(), "terms": list(self.design.names),
                           "interaction_term": self.design.interaction_term,
                           "description": self.mean.describe(COVARIATE_COLUMN)},
            "notes": list(self.notes),
            "n_subjects": self.n_subjects, "n_obs": self.n_obs, "n_dropped": self.n_dropped,
        })


def model_name(structure: str, method: str, correlation: str | None = None) -> str:
    """Readable model name, e.g. "intercept+slope (REML)", "serial (exponential, REML)"."""
    corr = f"{correlation}, " if correlation and spec_for(structure).serial else ""
    return f"{structure} ({corr}{method.upper()})"


def fit_candidates(cohort, *, structures=DEFAULT_CANDIDATES, correlation: str = "exponential",
                   method: str = "reml", mean: MeanModel = MeanModel(),
                   gee=None) -> ModelSet:
    """Fit candidate working covariance structures with one mean model and compare them.

    Parameters
    ----------
    cohort : PreparedCohort
        Needs ``panel`` and ``baseline`` (one row per subject in panel order with
        the centred covariate in column ``x`` and any confounders); optionally
        ``covariate``, ``settings`` (``transform``, ``unit``), ``roles``
        (``response``) and ``response_unit`` for the wording.
    structures : sequence of str
        Covariance structures (see :data:`analysis.models.mixed.STRUCTURES`).
    correlation : {"exponential", "gaussian", "both"}
        Serial correlation function for structures with a serial process; "both" fits
        each such structure with each shape, so the two sit side by side in the
        comparison (they are not nested: compare them by AIC/BIC, no LRT is formed).
    method : {"reml", "ml"}
    mean : MeanModel
    gee : sequence of str, optional
        GEE working correlations to fit as robustness rows (empty for none; default
        :data:`DEFAULT_GEE`).

    Returns
    -------
    ModelSet

    Raises
    ------
    ModelError
        Bad options, the design cannot be built (e.g. collinear confounders), or
        the response has no variation (constant, or reproduced exactly by the
        mean model). A candidate whose fit fails is recorded with its message instead.

    Notes
    -----
    Subjects lacking a value of any covariate the mean model uses are dropped
    before fitting (the count is in ``notes``), so every candidate sees the
    same data and their likelihoods are comparable. The preferred model is the
    one with the lowest AIC among converged fits — a common-practice rule; the
    LRTs and BIC are shown beside it.
    """
    from .mixed import CORRELATIONS, METHODS, STRUCTURES, fit_mixed

    structures = tuple(dict.fromkeys(structures))
    if not structures:
        raise ModelError("no candidate structures given; choose at least one of "
                         f"{list(STRUCTURES)}")
    bad = [s for s in structures if s not in STRUCTURES]
    if bad:
        raise ModelError(f"unknown structure(s) {bad}; choose from {list(STRUCTURES)}")
    if correlation not in (*CORRELATIONS, BOTH):
        raise ModelError(f"correlation == {correlation!r}, must be one of "
                         f"{[*CORRELATIONS, BOTH]}")
    shapes = CORRELATIONS if correlation == BOTH else (correlation,)
    if method not in METHODS:
        raise ModelError(f"method == {method!r}, must be one of {list(METHODS)}")
    gee = DEFAULT_GEE if gee is None else tuple(dict.fromkeys(gee or ()))
    bad = [w for w in gee if w not in WORKING]
    if bad:
        raise ModelError(f"unknown GEE working correlation(s) {bad}; choose from {list(WORKING)}")

    panel, baseline = cohort.panel, cohort.baseline.reset_index(drop=True)
    notes: list[str] = []
    if mean.covariate and COVARIATE_COLUMN not in baseline.columns:
        mean = MeanModel(time=mean.time, covariate=False, interaction=False,
                         confounders=mean.confounders, time_spline_df=mean.time_spline_df)
        notes.append("no numeric primary covariate: the covariate and time × covariate terms "
                     "were left out")
    keep = complete_subjects(baseline, mean, covariate_name=COVARIATE_COLUMN)
    n_dropped = int((~keep).sum())
    if n_dropped:
        cols = ", ".join(
            _display(c, cohort) for c in used_columns(mean, COVARIATE_COLUMN)
            if not complete_subjects(baseline, MeanModel(covariate=False, interaction=False,
                                                         confounders=(c,)), covariate_name=c).all())
        notes.append(f"{n_dropped} of {len(keep)} subjects dropped: missing value of {cols}")
        if not keep.any():
            raise ModelError(f"every subject lacks a value of {cols}; no model can be fitted")
        panel = panel.subset_subjects(keep)
        baseline = baseline.loc[keep].reset_index(drop=True)
    des = design(panel, baseline, mean, covariate_name=COVARIATE_COLUMN)
    from .mixed.fit import response_variation_problem
    problem = response_variation_problem(panel.y, des.X, response=_labels(cohort)["response_label"])
    if problem:
        raise ModelError(problem)

    candidates = []
    specs = {s: spec_for(s) for s in structures}
    runs = [(s, specs[s].correlation_for(c) or c) for s in structures
            for c in (shapes if specs[s].serial and not specs[s].shape else shapes[:1])]
    for s, shape in runs:
        name = model_name(s, method, shape)
        try:
            fit = fit_mixed(panel, des.X, names=des.names, structure=s,
                            correlation=shape, method=method)
        except (CohortError, np.linalg.LinAlgError, FloatingPointError, ValueError) as exc:
            candidates.append(Candidate(name, s, None, str(exc)))
            continue
        candidates.append(Candidate(name, s, fit, None))
    ok = [c for c in candidates if c.fit is not None]
    for c in candidates:
        if c.fit is None:
            notes.append(f"{c.name} could not be fitted: {c.error}")
        elif not c.fit.converged:
            notes.append(f"{c.name} did not converge: {getattr(c.fit, 'message', '')}")
    comp = comparison_table([c.fit for c in ok], labels=[c.name for c in ok])

    lrts = []
    for i, j in nested_pairs([c.fit for c in ok]):
        try:
            lrts.append(likelihood_ratio(ok[i].fit, ok[j].fit, null_label=ok[i].name,
                                         alt_label=ok[j].name))
        except ModelError as exc:  # pragma: no cover - nested_pairs pre-screens
            notes.append(f"LRT {ok[i].name} vs {ok[j].name} skipped: {exc}")

    gee_rows = []
    for w in gee:
        name = f"GEE ({w})"
        try:
            g = gee_fit(panel, des.X, names=des.names, working=w)
        except CohortError as exc:
            gee_rows.append(GEERow(name, w, None, str(exc)))
            notes.append(f"{name} could not be fitted: {exc}")
            continue
        if g.message:
            notes.append(f"{name}: {g.message}")
        gee_rows.append(GEERow(name, w, g, None))

    preferred = _preferred(ok)
    effect = None
    if preferred is not None and des.interaction_term is not None:
        fit = next(c.fit for c in ok if c.name == preferred)
        labels = _labels(cohort)
        effect = interaction_summary(fit, term=des.interaction_term,
                                     slope_term="time" if "time" in des.names else None,
                                     **labels)
    return ModelSet(mean=mean, design=des, candidates=tuple(candidates), comparison=comp,
                    lrts=tuple(lrts), gee=tuple(gee_rows), preferred=preferred, effect=effect,
                    notes=tuple(notes), n_subjects=panel.n_subjects, n_obs=panel.n_obs,
                    n_dropped=n_dropped, method=method, correlation=correlation, panel=panel)


# --------------------------------------------------------------------------- helpers
def _preferred(ok) -> str | None:
    """Lowest AIC among converged fits (all fits if none converged)."""
    pool = [c for c in ok if c.fit.converged and np.isfinite(c.fit.aic)]
    if not pool:
        pool = [c for c in ok if np.isfinite(c.fit.aic)]
    if not pool:
        return None
    return min(pool, key=lambda c: c.fit.aic).name


def _labels(cohort) -> dict:
    settings = getattr(cohort, "settings", None)
    roles = getattr(cohort, "roles", None)
    cov = getattr(cohort, "covariate", None) or "the covariate"
    return {
        "transform": getattr(settings, "transform", "none"),
        "covariate_label": f"baseline {cov}",
        "response_label": getattr(roles, "response", None) or "response",
        "response_unit": getattr(cohort, "response_unit", None) or "",
        "time_unit": getattr(settings, "unit", None) or "time units",
    }


def _display(col: str, cohort) -> str:
    if col == COVARIATE_COLUMN:
        return f"'{getattr(cohort, 'covariate', None) or col}'"
    return f"'{col}'"
