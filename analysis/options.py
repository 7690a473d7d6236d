"""Fixed choice sets, defined once and reused for validation, CLI flags and UI dropdowns."""
from __future__ import annotations

from typing import Literal, get_args

Origin = Literal["as-is", "event-date", "first-visit"]
Unit = Literal["days", "weeks", "months", "years"]
Transform = Literal["none", "log", "log2", "log10"]
StrataMethod = Literal["equal-width", "quantile", "custom"]
Detrend = Literal["none", "linear", "spline", "lowess"]
DuplicatePolicy = Literal["reject", "average"]
DateOrder = Literal["auto", "day-first", "month-first"]

ORIGINS: tuple[str, ...] = get_args(Origin)
UNITS: tuple[str, ...] = get_args(Unit)
TRANSFORMS: tuple[str, ...] = get_args(Transform)
STRATA_METHODS: tuple[str, ...] = get_args(StrataMethod)
DETRENDS: tuple[str, ...] = get_args(Detrend)
DUPLICATE_POLICIES: tuple[str, ...] = get_args(DuplicatePolicy)
DATE_ORDERS: tuple[str, ...] = get_args(DateOrder)
CENTER_WORDS: tuple[str, ...] = ("none", "mean", "median")

#: length of one unit in days (a month is an average Gregorian month)
DAYS_PER_UNIT: dict[str, float] = {
    "days": 1.0,
    "weeks": 7.0,
    "months": 30.4375,
    "years": 365.25,
}

#: plain-language description of a transform, used in effect statements
TRANSFORM_STEP: dict[str, str] = {
    "none": "each one-unit increase in",
    "log": "each e-fold (×2.718) increase in",
    "log2": "each doubling of",
    "log10": "each ten-fold increase in",
}
