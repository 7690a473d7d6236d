"""Column roles and analysis settings: frozen, hashable, JSON round-trippable.

Every choice a user makes lives in one :class:`Settings` object, so that a
cached result can be keyed by exactly the fields it depends on
(:data:`STAGE_FIELDS`, :func:`json_key`) and a dashboard view can be restored from a URL.
Each setting is declared once, as a :class:`Setting` in its field's metadata; validation,
the command line, the page address, the settings panel and the stage keys read it.
"""
from __future__ import annotations

import hashlib
import json
from datetime import date
from dataclasses import asdict, dataclass, field, fields, replace
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
    ``labels`` (optional) gives a role column a display label ("egfr" → "eGFR"), used in every
    title, axis, table and statement instead of the column name (:meth:`label`); given as a
    mapping or (column, label) pairs, kept as sorted pairs so Roles stay hashable.
    """

    subject: str
    time: str
    response: str
    covariates: tuple[str, ...] = ()
    event_date: str | None = None
    response_unit: str = ""
    covariate_unit: str = ""
    followup_end: str | None = None
    labels: tuple[tuple[str, str], ...] = ()

    def __post_init__(self):
        object.__setattr__(self, "covariates", tuple(self.covariates))
        object.__setattr__(self, "labels", _label_pairs(self.labels))

    def label(self, column: str | None) -> str | None:
        """The display label of ``column`` (the column name unless a label was given)."""
        if column is None:
            return None
        return dict(self.labels).get(column, column)

    def to_dict(self) -> dict[str, Any]:
        d = asdict(self)
        d["covariates"] = list(self.covariates)
        if self.labels:
            d["labels"] = dict(self.labels)
        else:                    # no labels: the JSON stays as it was before labels existed
            d.pop("labels")
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
        return cls(**{**d, "covariates": tuple(covs), "labels": d.get("labels") or ()})

    def columns(self) -> tuple[str, ...]:
        cols = [self.subject, self.time, self.response, *self.covariates]
        if self.event_date:
            cols.append(self.event_date)
        if self.followup_end:
            cols.append(self.followup_end)
        return tuple(dict.fromkeys(cols))


#: longest display label kept (a label is a short name, not a description)
LABEL_LIMIT = 60


def _label_pairs(labels) -> tuple[tuple[str, str], ...]:
    """Display labels as sorted (column, label) pairs; blank labels and labels equal to their
    column are dropped. A mapping or pairs of text, else a message."""
    if not labels:
        return ()
    items = labels.items() if isinstance(labels, dict) else labels
    try:
        pairs = [(c, t) for c, t in items]
    except (TypeError, ValueError):
        raise SettingsError(f"Display labels must be column: label pairs, not {_short(labels)}.",
                            field="roles") from None
    out = {}
    for column, text in pairs:
        if not isinstance(column, str) or not isinstance(text, str):
            raise SettingsError(f"Display label {_short(text)} of column {_short(column)} must "
                                "be text.", field="roles")
        text = " ".join(text.split())[:LABEL_LIMIT]
        if text and text != column:
            out[column] = text
    return tuple(sorted(out.items()))


@dataclass(frozen=True)
class Setting:
    """How one setting is declared: everything validation, the command line, the page address,
    the settings panel, the stage keys and the README table read about it.

    ``kind`` says how a value is written and checked: ``choice`` (one of ``choices``), ``count``
    (a whole number from ``lo`` to ``hi``), ``number`` (a finite number in the interval, ``lo``
    excluded when ``lo_open``; ``optional`` allows None), ``switch`` (true or false),
    ``column`` (a column name or None), ``date`` (YYYY-MM-DD or None), ``center`` (a word of
    ``choices`` or a number) and ``breaks`` (a list of numbers).
    """

    kind: str
    label: str                       # the settings panel's label (and messages on the page)
    help: str                        # the command-line help, before the derived "[default]"
    stage: str                       # the analysis stage that reads it (cache keys)
    flag: str                        # the command-line flag
    choices: tuple = ()              # allowed values (choice, center)
    choice_labels: dict | None = None  # page wording of each choice, in the page's order
    lo: float | None = None
    hi: float | None = None
    lo_open: bool = False
    optional: bool = False           # None allowed (blank on the page, 'none' in a link)
    default_text: str | None = None  # the default in words, for help and the README table
    off_flag: str | None = None      # a switch's flag that turns it off ...
    off_help: str | None = None      # ... and its help
    flag_sets: dict = field(default_factory=dict)  # other settings its flag sets unless given
    # settings panel: group heading (None: not in the panel), shown beside the next field with
    # the same ``pair``, placeholder, hint under the control, the text of a switch, radio buttons
    group: str | None = None
    pair: str | None = None
    placeholder: str | None = None
    hint: str | None = None
    check_text: str | None = None
    radio: bool = False
    needed_text: str | None = None   # the panel's message when another choice needs this blank one
    panel_min: float | None = None   # smallest value the page's number box steps to
    panel_step: float | None = None  # what the page's +/− add (a number box; counts step by 1)
    per_dataset: bool = False        # describes one table (its times, columns, values): a newly
    #                                  loaded table starts from the default again


def setting(default, kind: str, **declared):
    """A :class:`Settings` field with its declaration (see :class:`Setting`)."""
    return field(default=default, metadata={"setting": Setting(kind=kind, **declared)})


_TIME = "Time"
_GROUPS = "Groups (strata)"
_RESIDUALS = "Residuals (for spread and correlation)"
_VIEWS = "Spread and correlation views"


@dataclass(frozen=True)
class Settings:
    """Every analysis choice (see README "Settings" for meanings and defaults). Each field is
    declared once here, with its :class:`Setting` (see DEVELOPERS.md "Adding a setting")."""

    origin: str = setting(
        "as-is", "choice", choices=opt.ORIGINS, label="Time origin", help="time origin",
        stage="cohort", flag="--origin", group=_TIME, per_dataset=True, choice_labels={
            "as-is": "Time column as given (already time since origin)",
            "event-date": "Since each subject's event date",
            "first-visit": "Since each subject's first visit"})
    unit: str = setting(
        "months", "choice", choices=opt.UNITS, label="Time unit", help="time unit",
        stage="cohort", flag="--unit", group=_TIME)
    time_min: float | None = setting(
        None, "number", optional=True, label="Window from", default_text="none",
        help="drop visits before this time since origin", stage="cohort", flag="--time-min",
        group=_TIME, pair="window", placeholder="any", per_dataset=True)
    time_max: float | None = setting(
        None, "number", optional=True, label="Window to", default_text="none",
        help="drop visits after this time since origin", stage="cohort", flag="--time-max",
        group=_TIME, pair="window", placeholder="any", per_dataset=True)
    min_visits: int = setting(
        3, "count", lo=1, hi=1000, label="Fewest visits per subject",
        help="minimum visits per subject", stage="cohort", flag="--min-visits",
        group="Inclusion")
    require_covariate: bool = setting(
        True, "switch", label="Require the baseline covariate",
        help="drop subjects without the primary covariate", stage="cohort",
        flag="--require-covariate", off_flag="--keep-missing-covariate",
        off_help="keep subjects without the primary covariate", group="Inclusion",
        check_text="Drop subjects without the baseline covariate")
    covariate: str | None = setting(
        None, "column", label="Baseline covariate", default_text="first covariate",
        help="which baseline covariate is transformed and enters the interaction",
        stage="cohort", flag="--covariate-primary", group="Baseline covariate",
        placeholder="first covariate", per_dataset=True)
    duplicates: str = setting(
        "reject", "choice", choices=opt.DUPLICATE_POLICIES, label="Two visits at the same time",
        help="repeated (subject, time) rows: reject or average", stage="cohort",
        flag="--duplicates", group=_TIME,
        choice_labels={"reject": "stop with a message", "average": "average them"})
    date_order: str = setting(
        "auto", "choice", choices=opt.DATE_ORDERS, label="Dates written",
        help="how to read dates such as 03/04/2021: auto (stop when unclear), day-first or "
             "month-first", stage="cohort", flag="--date-order",
        hint="For dates with the year last, e.g. 03/04/2021.", choice_labels={
            "auto": "as the data show", "day-first": "day first (31.12.2021, 31/12/2021)",
            "month-first": "month first (12/31/2021)"})
    transform: str = setting(
        "none", "choice", choices=opt.TRANSFORMS, label="Transform",
        help="covariate transform", stage="strata", flag="--transform",
        group="Baseline covariate", per_dataset=True, choice_labels={
            "none": "none", "log": "natural log", "log2": "log base 2", "log10": "log base 10"})
    center: str | float = setting(
        "none", "center", choices=opt.CENTER_WORDS, label="Centre at",
        help="covariate centring: none, mean, median or a number", stage="strata",
        flag="--center", group="Baseline covariate", hint="On the transformed scale.",
        per_dataset=True,
        choice_labels={"none": "no centring", "mean": "cohort mean", "median": "cohort median",
                       "value": "a value I give"})
    stratify_by: str | None = setting(
        None, "column", label="Group subjects by", default_text="primary covariate",
        help="covariate to cut into strata", stage="strata", flag="--stratify-by",
        group=_GROUPS, placeholder="the baseline covariate", per_dataset=True)
    strata_method: str = setting(
        "quantile", "choice", choices=opt.STRATA_METHODS, label="How to cut groups",
        help="how to cut strata", stage="strata", flag="--strata-method", group=_GROUPS,
        radio=True, per_dataset=True, choice_labels={"quantile": "equal counts (quantiles)",
                                   "equal-width": "equal widths", "custom": "my own break points"})
    n_strata: int = setting(
        4, "count", lo=1, hi=50, label="Number of groups", help="number of strata",
        stage="strata", flag="--strata", group=_GROUPS)
    breaks: tuple[float, ...] = setting(
        (), "breaks", label="Break points", help="custom inner break points, e.g. 10,20,40",
        default_text="none", stage="strata", flag="--breaks", group=_GROUPS,
        flag_sets={"strata_method": "custom"}, per_dataset=True,
        needed_text="Enter the inner break points for your own groups, e.g. 10, 20, 40.",
        placeholder="e.g. 10, 20, 40", hint="Inner cut points in the covariate's own units.")
    detrend: str = setting(
        "spline", "choice", choices=opt.DETRENDS, label="Mean curve removed",
        help="mean model removed before residual views", stage="residuals", flag="--detrend",
        group=_RESIDUALS, choice_labels={
            "none": "none (raw response)", "linear": "straight line in time",
            "spline": "smooth spline in time", "lowess": "lowess smooth"})
    spline_df: int = setting(
        4, "count", lo=1, hi=20, label="Spline degrees of freedom",
        help="degrees of freedom of the detrending spline", stage="residuals",
        flag="--spline-df", group=_RESIDUALS, pair="smooth")
    lowess_frac: float = setting(
        0.3, "number", lo=0, hi=1, lo_open=True, label="Lowess span",
        help="lowess span for --detrend lowess", stage="residuals", flag="--lowess-frac",
        group=_RESIDUALS, pair="smooth", panel_min=0.01, panel_step=0.01)
    detrend_within_strata: bool = setting(
        False, "switch", label="Separate curve per group",
        help="fit the detrending curve per stratum", stage="residuals",
        flag="--detrend-within-strata", group=_RESIDUALS,
        check_text="Separate mean curve for each group")
    variogram_bins: int = setting(
        10, "count", lo=1, hi=200, label="Time-apart bins", help="semivariogram lag bins",
        stage="variogram", flag="--variogram-bins", group=_VIEWS, pair="variogram")
    variogram_max_lag: float | None = setting(
        None, "number", lo=0, lo_open=True, optional=True, label="Largest time apart",
        default_text="all lags", help="largest lag binned", stage="variogram",
        flag="--variogram-max-lag", group=_VIEWS, pair="variogram", placeholder="all",
        per_dataset=True)
    lag_width: float | None = setting(
        None, "number", lo=0, lo_open=True, optional=True, label="Lag window width",
        default_text="automatic", help="window width for lag correlations", stage="lagcorr",
        flag="--lag-width", group=_VIEWS, placeholder="auto", per_dataset=True,
        hint="Width of each time-apart window, in time units.")
    data_cut: str | None = setting(
        None, "date", label="Data cut (date)", default_text="latest visit date",
        help="date the data end, YYYY-MM-DD, for the dropout view", stage="summaries",
        flag="--data-cut", group=_TIME, placeholder="latest visit date", per_dataset=True,
        hint="YYYY-MM-DD: when the data end, for loss to follow-up.")

    def __post_init__(self):
        object.__setattr__(self, "breaks", _breaks(self.breaks))
        if isinstance(self.center, (int, float)) and not isinstance(self.center, bool):
            object.__setattr__(self, "center", float(self.center))
        self.validate()

    # -- validation -------------------------------------------------------
    def validate(self) -> None:
        """Each field against its declaration, then the rules that join fields."""
        for name, decl in DECLARED.items():
            check_value(name, getattr(self, name), decl)
        if (self.time_min is not None and self.time_max is not None
                and self.time_min >= self.time_max):
            raise SettingsError(
                f"{_label('time_min')} ({_num(self.time_min)}) must be smaller than "
                f"{_label('time_max')} ({_num(self.time_max)}).", field="time_min")
        most = DECLARED["n_strata"].hi
        if len(self.breaks) > most - 1:
            raise SettingsError(
                f"{_label('breaks')}: {len(self.breaks)} points make {len(self.breaks) + 1} "
                f"groups; at most {most - 1} points ({most} groups) are allowed.", field="breaks")
        if self.strata_method == "custom":
            if not self.breaks:
                raise SettingsError(
                    f"{_label('strata_method')} is set to your own break points, which needs "
                    f"{_label('breaks')}, e.g. 10, 20, 40.", field="breaks")
            if any(b <= a for a, b in zip(self.breaks, self.breaks[1:])):
                raise SettingsError(
                    f"{_label('breaks')} ({', '.join(map(_num, self.breaks))}) must be strictly "
                    "increasing: each larger than the one before.", field="breaks")

    # -- serialisation ----------------------------------------------------
    def to_dict(self) -> dict[str, Any]:
        d = asdict(self)
        d["breaks"] = list(self.breaks)
        return d

    @classmethod
    def from_dict(cls, d: dict[str, Any]) -> "Settings":
        if not isinstance(d, dict):
            raise SettingsError(f"settings must be a JSON object of name: value pairs, "
                                f"not {type(d).__name__}", field="settings")
        known = {f.name for f in fields(cls)}
        extra = set(d) - known
        if extra:
            raise SettingsError(
                f"unknown setting(s) {_short(sorted(map(str, extra)))}; known settings are "
                f"{sorted(known)}", field="settings")
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


#: each setting's declaration, in field order
DECLARED: dict[str, Setting] = {f.name: f.metadata["setting"] for f in fields(Settings)}

#: settings that describe one table (its time span, columns, covariate values); a newly
#: loaded table starts them from their defaults
PER_DATASET: tuple[str, ...] = tuple(n for n, d in DECLARED.items() if d.per_dataset)

#: Upper limits of the count settings, checked before anything is allocated (a shared link or
#: a flag can otherwise ask for millions of bins or groups). Generous for real use: more than
#: 200 lag bins or 50 groups cannot be read on a figure, a natural spline in time with more
#: than 20 df follows noise, and no cohort rule needs more than 1000 visits per subject.
#: Limits that depend on the data (groups <= subjects, spline df < distinct times) are checked
#: by the pipeline (analysis.pipeline.check_data_limits).
COUNT_LIMITS: dict[str, int] = {n: d.hi for n, d in DECLARED.items() if d.kind == "count"}

#: Which settings each stage of the analysis reads (the stages a result depends on are in
#: analysis.pipeline.Workbench.stage_fields).
STAGE_FIELDS: dict[str, tuple[str, ...]] = {}
for _name, _decl in DECLARED.items():
    STAGE_FIELDS[_decl.stage] = (*STAGE_FIELDS.get(_decl.stage, ()), _name)


def default_text(name: str) -> str:
    """A setting's default in words (command-line help, README table)."""
    decl = DECLARED[name]
    if decl.default_text is not None:
        return decl.default_text
    value = _DEFAULTS[name]
    if isinstance(value, bool):
        return "on" if value else "off"
    return f"{value:g}" if isinstance(value, float) else str(value)


_DEFAULTS: dict[str, Any] = {f.name: f.default for f in fields(Settings)}


def check_value(name: str, value, decl: Setting | None = None) -> None:
    """Raise SettingsError (with ``field=name``) unless ``value`` fits the declaration of
    setting ``name``; estimators call it to guard direct use with the same words."""
    decl = decl or DECLARED[name]
    kind = decl.kind
    if kind == "choice":
        _choice(name, value, decl.choices)
    elif kind == "count":
        _int_between(name, value, int(decl.lo), int(decl.hi))
    elif kind == "number":
        if value is None and decl.optional:
            return
        if value is None:
            raise SettingsError(f"{_label(name)} needs a number {_interval(decl)}.", field=name)
        _number_or_none(name, value)
        lo_ok = decl.lo is None or (value > decl.lo if decl.lo_open else value >= decl.lo)
        if not lo_ok or decl.hi is not None and not value <= decl.hi:
            raise SettingsError(f"{_label(name)} must be {_interval(decl)}; "
                                f"{_num(value)} is outside.", field=name)
    elif kind == "switch":
        if not isinstance(value, bool):
            raise SettingsError(f"{_label(name)} must be on or off (true or false), not "
                                f"{_short(value)}.", field=name)
    elif kind == "column":
        if value is not None and not isinstance(value, str):
            raise SettingsError(f"{_label(name)} must name a column or be left empty, not "
                                f"{_short(value)}.", field=name)
    elif kind == "date":
        if value is not None:
            _date_text(name, value)
    elif kind == "center":
        if isinstance(value, str) and value not in decl.choices:
            raise SettingsError(f"{_label(name)} must be {', '.join(decl.choices)} or a number, "
                                f"not {_short(value)}.", field=name)
        if not isinstance(value, (str, float)) or (
                isinstance(value, float) and not np.isfinite(value)):
            raise SettingsError(f"{_label(name)} must be {', '.join(decl.choices)} or a finite "
                                f"number, not {_short(value)}.", field=name)
    elif kind == "breaks":
        if not all(np.isfinite(value)):
            raise SettingsError(f"{_label(name)} must be finite numbers, not "
                                f"{', '.join(map(_num, value))}.", field=name)


def check_choice(value, choices: tuple) -> None:
    """Raise SettingsError unless ``value`` is one of ``choices``, an options tuple that one
    setting declares; the message and ``field`` name that setting (estimators' guards)."""
    name = next(n for n, d in DECLARED.items() if d.choices is choices)
    _choice(name, value, choices)


def _interval(decl: Setting) -> str:
    """The allowed values of a number or count in words ("from 1 to 1000", "greater than 0")."""
    whole = "a whole number " if decl.kind == "count" else ""
    if decl.lo is None and decl.hi is None:
        return "(any number)"
    if decl.hi is None:
        return f"{whole}{'greater than' if decl.lo_open else 'at least'} {_num(decl.lo)}"
    if decl.lo_open:
        return f"{whole}greater than {_num(decl.lo)} and at most {_num(decl.hi)}"
    return f"{whole}from {_num(decl.lo)} to {_num(decl.hi)}"


def allowed_text(name: str) -> str:
    """What setting ``name`` accepts, in words, for messages beside its control
    (e.g. "a whole number from 1 to 1000")."""
    decl = DECLARED[name]
    if decl.kind in ("count", "number"):
        text = _interval(decl)
        return text if decl.kind == "count" else f"a number {text}".replace(" (any number)", "")
    if decl.kind in ("choice", "center"):
        return _words(decl.choices)
    return decl.help


def _label(name: str) -> str:
    """A setting's label as the settings panel shows it (its name for anything undeclared)."""
    decl = DECLARED.get(name) if "DECLARED" in globals() else None
    return decl.label if decl is not None else name


def _num(v) -> str:
    """A number in a message: plain, no trailing zeros, true minus (analysis.numbers)."""
    from .numbers import format_number

    return format_number(v, 6)


def _words(choices) -> str:
    """'a, b or c'."""
    items = [str(c) for c in choices]
    return items[0] if len(items) == 1 else ", ".join(items[:-1]) + " or " + items[-1]


def json_key(value, length: int | None = None) -> str:
    """The cache key of a JSON-able value: sha1 of its JSON with sorted keys (anything JSON
    cannot write is written as its ``str``), cut to ``length`` hex digits."""
    raw = json.dumps(value, sort_keys=True, default=str)
    return hashlib.sha1(raw.encode()).hexdigest()[:length]


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
        raise SettingsError(f"{_label(name)} cannot be {_short(value)}; choose "
                            f"{_words(allowed)}.", field=name)


def _date_text(name: str, value) -> None:
    try:
        date.fromisoformat(value)
    except (TypeError, ValueError):
        raise SettingsError(f"{_label(name)} must be a date written YYYY-MM-DD, e.g. "
                            f"2024-06-30, not {_short(value)}.", field=name) from None


def _int_between(name: str, value, lo: int, hi: int) -> None:
    if isinstance(value, bool) or not isinstance(value, int):
        raise SettingsError(f"{_label(name)} must be a whole number from {lo} to {hi}, not "
                            f"{_short(value)}.", field=name)
    if not lo <= value <= hi:
        raise SettingsError(f"{_label(name)} must be a whole number from {lo} to {hi}; "
                            f"{value} is too {'small' if value < lo else 'large'}.", field=name)


def _number_or_none(name: str, value) -> None:
    if value is None:
        return
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not np.isfinite(value):
        raise SettingsError(f"{_label(name)} must be a finite number, not {_short(value)}.",
                            field=name)


def _breaks(value) -> tuple[float, ...]:
    """Break points as floats; a number, a string or anything else not a list is a message."""
    if value is None:
        return ()
    if isinstance(value, (str, bytes, dict)) or not hasattr(value, "__iter__"):
        raise SettingsError(f"{_label('breaks')} must be a list of numbers, e.g. [10, 20, 40], "
                            f"not {_short(value)}.", field="breaks")
    out = []
    for b in value:
        if isinstance(b, bool) or not isinstance(b, (int, float)):
            raise SettingsError(f"{_label('breaks')} must be a list of numbers, e.g. "
                                f"[10, 20, 40]; {_short(b)} is not a number.", field="breaks")
        out.append(float(b))
    return tuple(out)
