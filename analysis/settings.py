"""Column roles and analysis settings: frozen, hashable, JSON round-trippable.

Every choice a user makes lives in one :class:`Settings` object, so that a
cached result can be keyed by exactly the fields it depends on
(:meth:`Settings.key_for`) and a dashboard view can be restored from a URL.
"""
from __future__ import annotations

import hashlib
import json
from dataclasses import asdict, dataclass, fields, replace
from typing import Any

from . import options as opt
from .errors import SettingsError


@dataclass(frozen=True)
class Roles:
    """Which input column plays which part.

    ``time`` holds numbers (already time since some origin, in ``Settings.unit``)
    or calendar dates. ``event_date`` is a per-subject anchoring date (or number)
    used when ``Settings.origin == "event-date"``. ``covariates`` are baseline
    covariates (numeric or categorical), the first being the primary one unless
    ``Settings.covariate`` names another. ``response_unit`` and ``covariate_unit``
    (optional, e.g. "mL/min/1.73m²", "mg/mmol") only label axes and effect statements.
    """

    subject: str
    time: str
    response: str
    covariates: tuple[str, ...] = ()
    event_date: str | None = None
    response_unit: str = ""
    covariate_unit: str = ""

    def __post_init__(self):
        object.__setattr__(self, "covariates", tuple(self.covariates))

    def to_dict(self) -> dict[str, Any]:
        d = asdict(self)
        d["covariates"] = list(self.covariates)
        return d

    @classmethod
    def from_dict(cls, d: dict[str, Any]) -> "Roles":
        known = {f.name for f in fields(cls)}
        extra = set(d) - known
        if extra:
            raise SettingsError(f"unknown role(s) {sorted(extra)}; known roles are {sorted(known)}")
        return cls(**{**d, "covariates": tuple(d.get("covariates") or ())})

    def columns(self) -> tuple[str, ...]:
        cols = [self.subject, self.time, self.response, *self.covariates]
        if self.event_date:
            cols.append(self.event_date)
        return tuple(dict.fromkeys(cols))


# Which settings each stage of the analysis reads. A result is cached under the
# fields of its own stage plus those of every stage it depends on.
STAGE_FIELDS: dict[str, tuple[str, ...]] = {
    "cohort": ("origin", "unit", "time_min", "time_max", "min_visits", "require_covariate",
               "covariate", "duplicates"),
    "strata": ("transform", "center", "stratify_by", "strata_method", "n_strata", "breaks"),
    "residuals": ("detrend", "spline_df", "lowess_frac", "detrend_within_strata"),
    "variogram": ("variogram_bins", "variogram_max_lag"),
    "lagcorr": ("lag_width",),
}
STAGE_DEPENDS: dict[str, tuple[str, ...]] = {
    "cohort": (),
    "subject_fits": ("cohort",),
    "strata": ("cohort",),
    "residuals": ("cohort", "strata"),
    "variogram": ("cohort", "strata", "residuals"),
    "lagcorr": ("cohort", "strata", "residuals"),
}


@dataclass(frozen=True)
class Settings:
    """Every analysis choice (see README "Settings" for meanings and defaults)."""

    origin: str = "as-is"
    unit: str = "months"
    time_min: float | None = None
    time_max: float | None = None
    min_visits: int = 3
    require_covariate: bool = True
    covariate: str | None = None
    duplicates: str = "reject"
    transform: str = "none"
    center: str | float = "none"
    stratify_by: str | None = None
    strata_method: str = "quantile"
    n_strata: int = 4
    breaks: tuple[float, ...] = ()
    detrend: str = "spline"
    spline_df: int = 4
    lowess_frac: float = 0.3
    detrend_within_strata: bool = False
    variogram_bins: int = 10
    variogram_max_lag: float | None = None
    lag_width: float | None = None

    def __post_init__(self):
        object.__setattr__(self, "breaks", tuple(float(b) for b in self.breaks))
        if isinstance(self.center, (int, float)) and not isinstance(self.center, bool):
            object.__setattr__(self, "center", float(self.center))
        self.validate()

    # -- validation -------------------------------------------------------
    def validate(self) -> None:
        _choice("origin", self.origin, opt.ORIGINS)
        _choice("unit", self.unit, opt.UNITS)
        _choice("duplicates", self.duplicates, opt.DUPLICATE_POLICIES)
        _choice("transform", self.transform, opt.TRANSFORMS)
        _choice("strata_method", self.strata_method, opt.STRATA_METHODS)
        _choice("detrend", self.detrend, opt.DETRENDS)
        if isinstance(self.center, str) and self.center not in opt.CENTER_WORDS:
            raise SettingsError(
                f"center == {self.center!r}, must be one of {list(opt.CENTER_WORDS)} or a number"
            )
        _int_at_least("min_visits", self.min_visits, 1)
        _int_at_least("n_strata", self.n_strata, 1)
        _int_at_least("spline_df", self.spline_df, 1)
        _int_at_least("variogram_bins", self.variogram_bins, 1)
        if not 0 < self.lowess_frac <= 1:
            raise SettingsError(f"lowess_frac == {self.lowess_frac}, must be in (0, 1]")
        if self.lag_width is not None and not self.lag_width > 0:
            raise SettingsError(f"lag_width == {self.lag_width}, must be > 0")
        if self.variogram_max_lag is not None and not self.variogram_max_lag > 0:
            raise SettingsError(f"variogram_max_lag == {self.variogram_max_lag}, must be > 0")
        if (self.time_min is not None and self.time_max is not None
                and self.time_min >= self.time_max):
            raise SettingsError(
                f"time window [{self.time_min}, {self.time_max}] is empty: time_min must be < time_max"
            )
        if self.strata_method == "custom":
            if not self.breaks:
                raise SettingsError("strata_method == 'custom' needs breaks, e.g. breaks=(1.5, 3.0)")
            if any(b <= a for a, b in zip(self.breaks, self.breaks[1:])):
                raise SettingsError(f"breaks {list(self.breaks)} must be strictly increasing")

    # -- serialisation ----------------------------------------------------
    def to_dict(self) -> dict[str, Any]:
        d = asdict(self)
        d["breaks"] = list(self.breaks)
        return d

    @classmethod
    def from_dict(cls, d: dict[str, Any]) -> "Settings":
        known = {f.name for f in fields(cls)}
        extra = set(d) - known
        if extra:
            raise SettingsError(
                f"unknown setting(s) {sorted(extra)}; known settings are {sorted(known)}"
            )
        d = dict(d)
        if "breaks" in d and d["breaks"] is not None:
            d["breaks"] = tuple(d["breaks"])
        return cls(**d)

    def to_json(self) -> str:
        return json.dumps(self.to_dict(), sort_keys=True)

    @classmethod
    def from_json(cls, text: str) -> "Settings":
        return cls.from_dict(json.loads(text))

    def replace(self, **changes) -> "Settings":
        return replace(self, **changes)

    def only(self, names) -> "Settings":
        """These settings' values for ``names``, the defaults for every other field (what a
        cached stage result carries, so that it never reports a cache neighbour's choices)."""
        return Settings(**{n: getattr(self, n) for n in names})

    # -- cache keys -------------------------------------------------------
    def fields_for(self, stage: str) -> tuple[str, ...]:
        """All setting names that ``stage`` depends on (its own and its upstream stages')."""
        if stage not in STAGE_DEPENDS:
            raise KeyError(f"unknown stage {stage!r}; stages are {sorted(STAGE_DEPENDS)}")
        names: list[str] = []
        for s in (*STAGE_DEPENDS[stage], stage):
            names.extend(STAGE_FIELDS.get(s, ()))
        return tuple(names)

    def key_for(self, stage: str) -> str:
        """Short stable hash of the settings ``stage`` depends on."""
        d = self.to_dict()
        sub = {k: d[k] for k in self.fields_for(stage)}
        return hashlib.sha1(json.dumps(sub, sort_keys=True).encode()).hexdigest()[:16]


def _choice(name: str, value, allowed) -> None:
    if value not in allowed:
        raise SettingsError(f"{name} == {value!r}, must be one of {list(allowed)}")


def _int_at_least(name: str, value, lo: int) -> None:
    if isinstance(value, bool) or not isinstance(value, int):
        raise SettingsError(f"{name} == {value!r}, must be a whole number >= {lo}")
    if value < lo:
        raise SettingsError(f"{name} == {value}, must be >= {lo}")
