"""Column roles and analysis settings: frozen, hashable, JSON round-trippable.

Every choice a user makes lives in one :class:`Settings` object, so that a
cached result can be keyed by exactly the fields it depends on
(:meth:`Settings.key_for`) and a dashboard view can be restored from a URL.
"""
from __future__ import annotations

import hashlib
import json
from datetime import date
from dataclasses import asdict, dataclass, fields, replace
from typing import Any

import numpy as np

from . import options as opt
from .errors import SettingsError


@dataclass(frozen=True)
class Roles:
    """Which input column plays which part.

    ``time`` holds numbers (already time since some origin, in ``Settings.unit``)
    or calendar dates. ``followup_end`` (optional, dates or numbers like ``time``, the same
    on every row of a subject) is when each subject's follow-up was due to end; the
    dropout view uses it to tell leaving early from reaching the end of the data. ``event_date`` is a per-subject anchoring date (or number)
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
    followup_end: str | None = None

    def __post_init__(self):
        object.__setattr__(self, "covariates", tuple(self.covariates))

    def to_dict(self) -> dict[str, Any]:
        d = asdict(self)
        d["covariates"] = list(self.covariates)
        return d

    @classmethod
    def from_dict(cls, d: dict[str, Any]) -> "Roles":
        if not isinstance(d, dict):
            raise SettingsError(f"roles must be a JSON object of role: column pairs, "
                                f"not {type(d).__name__}", field="roles")
        known = {f.name for f in fields(cls)}
        extra = set(d) - known
        if extra:
            raise SettingsError(f"unknown role(s) {_short(sorted(map(str, extra)))}; known roles "
                                f"are {sorted(known)}", field="roles")
        missing = [n for n in ("subject", "time", "response") if n not in d]
        if missing:
            raise SettingsError(f"missing role(s) {missing}", field="roles")
        covs = d.get("covariates") or ()
        if isinstance(covs, str):
            covs = (covs,)
        if not isinstance(covs, (list, tuple)) or not all(isinstance(c, str) for c in covs):
            raise SettingsError(f"role covariates == {_short(covs)}, must be a list of column "
                                "names", field="roles")
        for name in ("subject", "time", "response"):
            if not isinstance(d[name], str) or not d[name]:
                raise SettingsError(f"role {name} == {_short(d[name])}, must be a column name",
                                    field="roles")
        for name in ("event_date",):
            if d.get(name) is not None and not isinstance(d[name], str):
                raise SettingsError(f"role {name} == {_short(d[name])}, must be a column name",
                                    field="roles")
        for name in ("response_unit", "covariate_unit"):
            if name in d and not isinstance(d[name], str):
                raise SettingsError(f"role {name} == {_short(d[name])}, must be text",
                                    field="roles")
        return cls(**{**d, "covariates": tuple(covs)})

    def columns(self) -> tuple[str, ...]:
        cols = [self.subject, self.time, self.response, *self.covariates]
        if self.event_date:
            cols.append(self.event_date)
        if self.followup_end:
            cols.append(self.followup_end)
        return tuple(dict.fromkeys(cols))


#: Upper limits of the count settings, checked before anything is allocated (a shared link or
#: a flag can otherwise ask for millions of bins or groups). Generous for real use: more than
#: 200 lag bins or 50 groups cannot be read on a figure, a natural spline in time with more
#: than 20 df follows noise, and no cohort rule needs more than 1000 visits per subject.
#: Limits that depend on the data (groups <= subjects, spline df < distinct times) are checked
#: by the pipeline (analysis.pipeline.check_data_limits).
COUNT_LIMITS: dict[str, int] = {
    "min_visits": 1000,
    "n_strata": 50,
    "spline_df": 20,
    "variogram_bins": 200,
}

# Which settings each stage of the analysis reads. A result is cached under the
# fields of its own stage plus those of every stage it depends on.
STAGE_FIELDS: dict[str, tuple[str, ...]] = {
    "cohort": ("origin", "unit", "time_min", "time_max", "min_visits", "require_covariate",
               "covariate", "duplicates", "date_order"),
    "strata": ("transform", "center", "stratify_by", "strata_method", "n_strata", "breaks"),
    "residuals": ("detrend", "spline_df", "lowess_frac", "detrend_within_strata"),
    "variogram": ("variogram_bins", "variogram_max_lag"),
    "lagcorr": ("lag_width",),
    "summaries": ("data_cut",),
}
STAGE_DEPENDS: dict[str, tuple[str, ...]] = {
    "cohort": (),
    "subject_fits": ("cohort",),
    "strata": ("cohort",),
    "residuals": ("cohort", "strata"),
    "variogram": ("cohort", "strata", "residuals"),
    "lagcorr": ("cohort", "strata", "residuals"),
    "summaries": ("cohort", "strata"),
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
    date_order: str = "auto"
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
    data_cut: str | None = None

    def __post_init__(self):
        object.__setattr__(self, "breaks", _breaks(self.breaks))
        if isinstance(self.center, (int, float)) and not isinstance(self.center, bool):
            object.__setattr__(self, "center", float(self.center))
        self.validate()

    # -- validation -------------------------------------------------------
    def validate(self) -> None:
        _choice("origin", self.origin, opt.ORIGINS)
        _choice("unit", self.unit, opt.UNITS)
        _choice("duplicates", self.duplicates, opt.DUPLICATE_POLICIES)
        _choice("date_order", self.date_order, opt.DATE_ORDERS)
        _choice("transform", self.transform, opt.TRANSFORMS)
        _choice("strata_method", self.strata_method, opt.STRATA_METHODS)
        _choice("detrend", self.detrend, opt.DETRENDS)
        for name in ("covariate", "stratify_by"):
            v = getattr(self, name)
            if v is not None and not isinstance(v, str):
                raise SettingsError(f"{name} == {_short(v)}, must be a column name or empty",
                                    field=name)
        for name in ("require_covariate", "detrend_within_strata"):
            if not isinstance(getattr(self, name), bool):
                raise SettingsError(f"{name} == {_short(getattr(self, name))}, must be true or false",
                                    field=name)
        if isinstance(self.center, str) and self.center not in opt.CENTER_WORDS:
            raise SettingsError(
                f"center == {_short(self.center)}, must be one of {list(opt.CENTER_WORDS)} or a number",
                field="center")
        if not isinstance(self.center, (str, float)) or (
                isinstance(self.center, float) and not np.isfinite(self.center)):
            raise SettingsError(f"center == {_short(self.center)}, must be one of "
                                f"{list(opt.CENTER_WORDS)} or a finite number", field="center")
        for name, hi in COUNT_LIMITS.items():
            _int_between(name, getattr(self, name), 1, hi)
        for name in ("time_min", "time_max", "lowess_frac", "lag_width", "variogram_max_lag"):
            _number_or_none(name, getattr(self, name))
        if self.lowess_frac is None:
            raise SettingsError("lowess_frac == None, must be a number in (0, 1]",
                                field="lowess_frac")
        if not 0 < self.lowess_frac <= 1:
            raise SettingsError(f"lowess_frac == {self.lowess_frac}, must be in (0, 1]",
                                field="lowess_frac")
        if self.lag_width is not None and not self.lag_width > 0:
            raise SettingsError(f"lag_width == {self.lag_width}, must be > 0", field="lag_width")
        if self.variogram_max_lag is not None and not self.variogram_max_lag > 0:
            raise SettingsError(f"variogram_max_lag == {self.variogram_max_lag}, must be > 0",
                                field="variogram_max_lag")
        if (self.time_min is not None and self.time_max is not None
                and self.time_min >= self.time_max):
            raise SettingsError(
                f"time window [{self.time_min}, {self.time_max}] is empty: time_min must be < time_max",
                field="time_min")
        if self.data_cut is not None:
            _date_text("data_cut", self.data_cut)
        if len(self.breaks) > COUNT_LIMITS["n_strata"] - 1:
            raise SettingsError(
                f"breaks: {len(self.breaks)} break points make {len(self.breaks) + 1} groups; "
                f"at most {COUNT_LIMITS['n_strata'] - 1} break points "
                f"({COUNT_LIMITS['n_strata']} groups) are allowed", field="breaks")
        if not all(np.isfinite(self.breaks)):
            raise SettingsError(f"breaks {list(self.breaks)} must be finite numbers", field="breaks")
        if self.strata_method == "custom":
            if not self.breaks:
                raise SettingsError("strata_method == 'custom' needs breaks, e.g. breaks=(1.5, 3.0)",
                                    field="breaks")
            if any(b <= a for a, b in zip(self.breaks, self.breaks[1:])):
                raise SettingsError(f"breaks {list(self.breaks)} must be strictly increasing",
                                    field="breaks")

    # -- serialisation ----------------------------------------------------
    def to_dict(self) -> dict[str, Any]:
        d = asdict(self)
        d["breaks"] = list(self.breaks)
        return d

    @classmethod
    def from_dict(cls, d: dict[str, Any]) -> "Settings":
        if not isinstance(d, dict):
            raise SettingsError(f"settings must be a JSON object of name: value pairs, "
                                f"not {type(d).__name__}")
        known = {f.name for f in fields(cls)}
        extra = set(d) - known
        if extra:
            raise SettingsError(
                f"unknown setting(s) {_short(sorted(map(str, extra)))}; known settings are "
                f"{sorted(known)}")
        return cls(**dict(d))

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


def _short(value, limit: int = 200) -> str:
    """repr of a value, cut to ``limit`` characters (messages never echo a whole huge input)."""
    text = repr(value)
    return text if len(text) <= limit else text[:limit - 1] + "…"


def _choice(name: str, value, allowed) -> None:
    try:
        ok = value in allowed
    except TypeError:                     # unhashable or otherwise incomparable
        ok = False
    if not ok:
        raise SettingsError(f"{name} == {_short(value)}, must be one of {list(allowed)}",
                            field=name)


def _date_text(name: str, value) -> None:
    try:
        date.fromisoformat(value)
    except (TypeError, ValueError):
        raise SettingsError(f"{name} == {_short(value)}, must be a date written YYYY-MM-DD, "
                            "e.g. 2024-06-30", field=name) from None


def _int_between(name: str, value, lo: int, hi: int) -> None:
    if isinstance(value, bool) or not isinstance(value, int):
        raise SettingsError(f"{name} == {_short(value)}, must be a whole number from {lo} to {hi}",
                            field=name)
    if not lo <= value <= hi:
        raise SettingsError(f"{name} == {value}, must be from {lo} to {hi}", field=name)


def _number_or_none(name: str, value) -> None:
    if value is None:
        return
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not np.isfinite(value):
        raise SettingsError(f"{name} == {_short(value)}, must be a finite number", field=name)


def _breaks(value) -> tuple[float, ...]:
    """Break points as floats; a number, a string or anything else not a list is a message."""
    if value is None:
        return ()
    if isinstance(value, (str, bytes, dict)) or not hasattr(value, "__iter__"):
        raise SettingsError(f"breaks == {_short(value)}, must be a list of numbers, "
                            "e.g. [10, 20, 40]", field="breaks")
    out = []
    for b in value:
        if isinstance(b, bool) or not isinstance(b, (int, float)):
            raise SettingsError(f"breaks holds {_short(b)}, must be a list of numbers, "
                                "e.g. [10, 20, 40]", field="breaks")
        out.append(float(b))
    return tuple(out)
