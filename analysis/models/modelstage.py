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
from typing import Any, Callable

import numpy as np

from ..errors import ModelError
from .mean_model import MeanModel
from .modelling import (BOTH, COVARIATE_COLUMN, DEFAULT_CANDIDATES, DEFAULT_GEE, ModelSet,
                        fit_candidates)
from ..settings import COUNT_LIMITS


#: Settings the model stage reads beyond the cohort selection: the primary covariate is
#: transformed and centred (column ``x``); the strata are never used by a fit.
MODEL_FIELDS: tuple[str, ...] = ("transform", "center")


@dataclass(frozen=True)
class ChoiceField:
    """How one model choice is offered: the single declaration the CLI flags and the page's
    Models controls are built from.

    Attributes
    ----------
    name : str
        The :class:`ModelChoices` field.
    label : str
        Label of the page's control.
    help : str
        CLI help text (the default is appended by the CLI) and the page's hint.
    flag : str
        CLI flag.
    kind : {"list", "one", "switch", "count"}
        "list": comma-separated values; "one": one of ``options``; "switch": a flag
        without value that sets the field to ``switch_value``; "count": a whole number
        within ``limits`` (or empty).
    options : callable or None
        () -> tuple of (value, label), the allowed values in the order offered.
    switch_value : object
        Value a "switch" flag sets.
    limits : tuple of (int, int) or None
        Smallest and largest allowed count.
    """

    name: str
    label: str
    help: str
    flag: str
    kind: str
    options: Callable[[], tuple[tuple[str, str], ...]] | None = None
    switch_value: Any = None
    limits: tuple[int, int] | None = None

    def values(self) -> tuple[str, ...]:
        """The allowed values (empty when the field has no fixed list)."""
        return tuple(v for v, _ in self.options()) if self.options else ()


def structure_options() -> tuple[tuple[str, str], ...]:
    """(structure, label) from the structures table, simplest first."""
    from .mixed.structures import structure_labels

    return structure_labels()


def correlation_options() -> tuple[tuple[str, str], ...]:
    """(shape, label) of every registered correlation shape, then 'both'."""
    from .mixed.structures import CORRELATION_SHAPES

    return (*((k, c.label) for k, c in CORRELATION_SHAPES.items()),
            (BOTH, "both, side by side"))


def method_options() -> tuple[tuple[str, str], ...]:
    from .mixed.structures import METHODS

    return tuple((m, m.upper()) for m in METHODS)


def gee_options() -> tuple[tuple[str, str], ...]:
    from .gee import WORKING

    return tuple((w, w) for w in WORKING)


#: Every model choice, declared once (see :class:`ChoiceField`); defaults are
#: :class:`ModelChoices`' field defaults.
CHOICE_FIELDS: dict[str, ChoiceField] = {f.name: f for f in (
    ChoiceField("structures", "Working covariance structures to compare",
                "comma-separated covariance structures to fit", "--models", "list",
                structure_options),
    ChoiceField("correlation", "Serial correlation shape",
                "serial correlation shape; 'both' fits each serial structure with each",
                "--correlation", "one", correlation_options),
    ChoiceField("method", "Estimation", "maximum likelihood instead of REML", "--ml", "switch",
                method_options, switch_value="ml"),
    ChoiceField("confounders", "Adjust for (other baseline covariates)",
                "comma-separated baseline covariates added to the mean model", "--confounders",
                "list"),
    ChoiceField("time_spline_df", "Time as a natural spline (df)",
                "natural spline in time with this many df instead of a straight line",
                "--time-spline-df", "count", limits=(1, COUNT_LIMITS["spline_df"])),
    ChoiceField("gee", "GEE robustness rows", "skip the GEE robustness rows", "--no-gee",
                "switch", gee_options, switch_value=()),
)}


@dataclass(frozen=True)
class ModelChoices:
    """Options of the modelling step.

    Attributes
    ----------
    structures : tuple of str
        Working covariance structures to fit (see :data:`analysis.models.mixed.STRUCTURES`).
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
        """Check every option against :data:`CHOICE_FIELDS` (called on construction)."""
        f = CHOICE_FIELDS
        if not self.structures:
            raise ModelError("no covariance structure chosen; tick at least one of "
                             f"{list(f['structures'].values())}")
        bad = [s for s in self.structures if s not in f["structures"].values()]
        if bad:
            raise ModelError(f"structures {bad} not known; choose from "
                             f"{list(f['structures'].values())}")
        if self.correlation not in f["correlation"].values():
            raise ModelError(f"correlation == {self.correlation!r}, must be one of "
                             f"{list(f['correlation'].values())}")
        if self.method not in f["method"].values():
            raise ModelError(f"method == {self.method!r}, must be one of "
                             f"{list(f['method'].values())}")
        df = self.time_spline_df
        if df is not None:
            lo, hi = f["time_spline_df"].limits
            if isinstance(df, bool) or not isinstance(df, (int, np.integer)):
                raise ModelError(f"time_spline_df == {df!r}, must be a whole number >= {lo} "
                                 "or empty for a straight line")
            if not lo <= df <= hi:
                raise ModelError(f"time_spline_df == {df}, must be from {lo} to {hi}")
        bad = [w for w in self.gee if w not in f["gee"].values()]
        if bad:
            raise ModelError(f"GEE working correlations {bad} not known; choose from "
                             f"{list(f['gee'].values())}")

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
