"""Confidence level of every interval in the analysis, and its normal and t quantiles.

One default (:data:`CONFIDENCE_LEVEL`); functions take the level as a parameter so
that a caller can ask for another without a second constant. Quantiles come from
scipy, never from a rounded literal.
"""
from __future__ import annotations

from functools import lru_cache

from scipy import stats

#: two-sided confidence level of intervals and bands unless a caller asks for another
CONFIDENCE_LEVEL = 0.95


def upper_tail(level: float = CONFIDENCE_LEVEL) -> float:
    """Probability ``0.5 + level / 2`` whose quantile gives a two-sided ``level`` interval."""
    level = float(level)
    if not 0.0 < level < 1.0:
        raise ValueError(f"confidence level == {level!r}, must be in (0, 1)")
    return 0.5 + level / 2.0


@lru_cache(maxsize=16)
def z_quantile(level: float = CONFIDENCE_LEVEL) -> float:
    """Standard-normal quantile of a two-sided ``level`` interval (1.959963984540054 at 0.95)."""
    return float(stats.norm.ppf(upper_tail(level)))


def t_quantile(df, level: float = CONFIDENCE_LEVEL):
    """Student-t quantile(s) of a two-sided ``level`` interval with ``df`` degrees of freedom.

    ``df`` may be an array (returns an array) or a number (returns a numpy float);
    ``np.inf`` gives the normal quantile.
    """
    return stats.t.ppf(upper_tail(level), df)


__all__ = ["CONFIDENCE_LEVEL", "upper_tail", "z_quantile", "t_quantile"]
