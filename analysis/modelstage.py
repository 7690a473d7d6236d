"""The model choices a user makes and the cached model-fitting stage built on them.

:class:`ModelChoices` holds every option of the modelling step (which working
covariance structures to try, the serial correlation shape, REML or ML, the
confounders and an optional spline in time). It is frozen and hashable so the
:class:`~analysis.pipeline.Workbench` can key fitted model sets by it, and it
round-trips through a plain dict so a browser store can carry it.
"""
from __future__ import annotations

import hashlib
import json
from dataclasses import dataclass, fields
from typing import Any

import numpy as np

from .errors import ModelError
from .mean_model import MeanModel
from .modelling import COVARIATE_COLUMN, DEFAULT_CANDIDATES, DEFAULT_GEE, ModelSet, fit_candidates
from .settings import COUNT_LIMITS


@dataclass(frozen=True)
class ModelChoices:
    """Options of the modelling step.

    Attributes
    ----------
    structures : tuple of str
        Working covariance structures to fit (see :data:`analysis.mixed.STRUCTURES`).
    correlation : {"exponential", "gaussian", "both"}
        Serial correlation shape for structures with a serial process ("both": each shape).
    method : {"reml", "ml"}
    confounders : tuple of str
        Baseline covariates (other than the primary one) adjusted for.
    time_spline_df : int or None
        Natural cubic spline in time with this many columns instead of a straight line.
    gee : tuple of str
        GEE working correlations fitted as robustness rows (empty for none).

    Raises
    ------
    ModelError
        An option outside its allowed values; the message names the option,
        the value and the valid choices.
    """

    structures: tuple[str, ...] = DEFAULT_CANDIDATES
    correlation: str = "exponential"
    method: str = "reml"
    confounders: tuple[str, ...] = ()
    time_spline_df: int | None = None
    gee: tuple[str, ...] = DEFAULT_GEE

    def __post_init__(self):
        for name in ("structures", "confounders", "gee"):
            value = getattr(self, name)
            if isinstance(value, str):
                value = (value,) if value else ()
            object.__setattr__(self, name, tuple(dict.fromkeys(str(v) for v in (value or ()))))
        df = self.time_spline_df
        if df is not None and not isinstance(df, bool) and isinstance(df, (float, np.floating)) \
                and float(df).is_integer():
            object.__setattr__(self, "time_spline_df", int(df))
        self.validate()

    def validate(self) -> None:
        """Check every option (called on construction)."""
        from .gee import WORKING
        from .mixed import CORRELATIONS, METHODS, STRUCTURES

        if not self.structures:
            raise ModelError("no covariance structure chosen; tick at least one of "
                             f"{list(STRUCTURES)}")
        bad = [s for s in self.structures if s not in STRUCTURES]
        if bad:
            raise ModelError(f"structures {bad} not known; choose from {list(STRUCTURES)}")
        if self.correlation not in (*CORRELATIONS, "both"):
            raise ModelError(f"correlation == {self.correlation!r}, must be one of "
                             f"{[*CORRELATIONS, 'both']}")
        if self.method not in METHODS:
            raise ModelError(f"method == {self.method!r}, must be one of {list(METHODS)}")
        df = self.time_spline_df
        if df is not None:
            if isinstance(df, bool) or not isinstance(df, (int, np.integer)):
                raise ModelError(f"time_spline_df == {df!r}, must be a whole number >= 1 "
                                 "or empty for a straight line")
            if not 1 <= df <= COUNT_LIMITS["spline_df"]:
                raise ModelError(f"time_spline_df == {df}, must be from 1 to "
                                 f"{COUNT_LIMITS['spline_df']}")
        bad = [w for w in self.gee if w not in WORKING]
        if bad:
            raise ModelError(f"GEE working correlations {bad} not known; choose from "
                             f"{list(WORKING)}")

    # -- serialisation ------------------------------------------------------
    def to_dict(self) -> dict[str, Any]:
        return {"structures": list(self.structures), "correlation": self.correlation,
                "method": self.method, "confounders": list(self.confounders),
                "time_spline_df": self.time_spline_df, "gee": list(self.gee)}

    @classmethod
    def from_dict(cls, d: dict[str, Any] | None) -> "ModelChoices":
        d = dict(d or {})
        known = {f.name for f in fields(cls)}
        extra = set(d) - known
        if extra:
            raise ModelError(f"unknown model option(s) {sorted(extra)}; known options are "
                             f"{sorted(known)}")
        for name in ("structures", "confounders", "gee"):
            if name in d:
                d[name] = tuple(d[name] or ())
        return cls(**d)

    def key(self) -> str:
        """Short stable hash of the options (part of the model stage's cache key)."""
        raw = json.dumps(self.to_dict(), sort_keys=True)
        return hashlib.sha1(raw.encode()).hexdigest()[:16]

    def mean_model(self) -> MeanModel:
        """The mean model these choices ask for (time, covariate, interaction, confounders)."""
        return MeanModel(confounders=self.confounders, time_spline_df=self.time_spline_df)


def check_confounders(cohort, choices: ModelChoices) -> None:
    """Confounders must be baseline covariates under the roles, other than the primary one.

    Raises
    ------
    ModelError
        Naming the offending column and the columns that can be chosen.
    """
    roles = getattr(cohort, "roles", None)
    allowed = [c for c in (roles.covariates if roles else ()) if c != cohort.covariate]
    for c in choices.confounders:
        if c == cohort.covariate:
            raise ModelError(f"confounder '{c}' is the primary covariate, which is already in "
                             "the model; choose another baseline covariate")
        if c not in allowed or c not in cohort.baseline.columns or c == COVARIATE_COLUMN:
            raise ModelError(f"confounder '{c}' is not one of the baseline covariates under the "
                             f"column roles; choose from {allowed or 'none (add covariates)'}")


def fit_models(cohort, choices: ModelChoices) -> ModelSet:
    """Fit the chosen candidate models to a prepared cohort (uncached).

    Parameters
    ----------
    cohort : PreparedCohort
    choices : ModelChoices

    Returns
    -------
    ModelSet

    Raises
    ------
    ModelError
        Bad confounders or a design that cannot be built.
    """
    check_confounders(cohort, choices)
    return fit_candidates(cohort, structures=choices.structures,
                          correlation=choices.correlation, method=choices.method,
                          mean=choices.mean_model(), gee=choices.gee)
