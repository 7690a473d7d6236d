"""Linear mixed models with random effects, serial correlation and measurement error.

Public entry point :func:`fit_mixed`; result :class:`MixedFit`.
"""
from .fit import fit_mixed
from .results import REFERENCE_TEXT, SMALL_COHORT, MixedFit
from .structures import CORRELATIONS, METHODS, PARAMETER_ORDER, STRUCTURES, StructureSpec, spec_for

__all__ = ["fit_mixed", "MixedFit", "STRUCTURES", "CORRELATIONS", "METHODS", "PARAMETER_ORDER",
           "StructureSpec", "spec_for", "REFERENCE_TEXT", "SMALL_COHORT"]
