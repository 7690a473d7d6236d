"""From a raw table and the user's choices to a prepared cohort.

Two steps, cached separately by the pipeline:

1. :func:`select_cohort` validates the columns, re-anchors time, applies the
   inclusion rules and records what each rule removed (the attrition table).
2. :func:`stratify` transforms and centres the primary baseline covariate and
   cuts the stratifier into groups.

:func:`prepare` runs both. Every problem with the input is raised as a
:class:`~analysis.errors.DataError` naming the column, the first offending rows
(spreadsheet numbering: the header is row 1) and what was expected.
"""
from __future__ import annotations

import copy
from dataclasses import dataclass

import numpy as np
import pandas as pd

from .. import options as opt
from ..errors import DataError, SettingsError, clip, row_list, rows_hold
from .loading import (NON_FINITE_TEXT, column_kind, date_fraction, decimal_comma_numbers,
                      nested_cells, read_dates)
from ..numbers import plain_number
from .panel import Panel
from ..settings import Roles, Settings
from .strata import MISSING_LABEL, Strata, categorical_strata, center_values, cut_strata, transform_values

# --------------------------------------------------------------------------- results
@dataclass(frozen=True)
class AttritionStep:
    """One inclusion step: what remains after it and what it removed."""

    step: str
    subjects: int
    observations: int
    subjects_removed: int
    observations_removed: int


@dataclass(frozen=True)
class Attrition:
    """The ordered inclusion steps, starting from every row read."""

    steps: tuple[AttritionStep, ...]

    def to_frame(self) -> pd.DataFrame:
        return pd.DataFrame([s.__dict__ for s in self.steps],
                            columns=["step", "subjects", "observations",
                                     "subjects_removed", "observations_removed"])

    def to_json(self) -> list[dict]:
        return [dict(s.__dict__) for s in self.steps]


@dataclass(frozen=True, eq=False)
class FollowupBasis:
    """Each subject's time origin and end of follow-up, in the time column's own scale.

    The dropout view needs each subject's potential follow-up (origin to the end of the data)
    to tell leaving early from not having reached a time yet; :meth:`potential` computes it.

    Attributes
    ----------
    kind : str
        'date' (scale: days since 1970-01-01) or 'number' (the time column's numbers).
    origin : ndarray (n_subjects,)
        Each subject's time origin on that scale (panel code order).
    end : ndarray or None
        Each subject's end of follow-up from the ``followup_end`` role (NaN where empty);
        None without that role.
    latest : float
        The latest visit date in the file (dates only; NaN for numbers).
    unit_days : float
        Days per analysis time unit (dates only; 1.0 for numbers).
    end_column : str or None
        The ``followup_end`` column.
    """

    kind: str
    origin: np.ndarray
    end: np.ndarray | None
    latest: float
    unit_days: float
    end_column: str | None = None

    def potential(self, *, data_cut: str | None = None, time_max: float | None = None
                  ) -> tuple[np.ndarray | None, str, tuple[str, ...]]:
        """(potential follow-up per subject in the analysis unit or None, its source, notes).

        Dates: from the origin to the data cut (``data_cut``, default the latest visit date
        in the file), or to the subject's follow-up end when that is earlier. Numbers: to the
        follow-up end; without that column it cannot be known (None). Capped at ``time_max``
        (visits after it are not analysed).
        """
        notes: list[str] = []
        if self.kind == "date":
            chosen = data_cut is not None
            cut = (_days(pd.Series(pd.to_datetime([data_cut])))[0] if chosen else self.latest)
            cut_text = _day_text(cut) + (", as chosen" if chosen else
                                         ", the latest visit date in the file")
            if self.end is None:
                end, source = np.full(self.origin.size, cut), f"data cut {cut_text}"
            else:
                end = np.fmin(self.end, cut)
                source = (f"each subject's '{self.end_column}', or the data cut {cut_text}, "
                          "if earlier")
            pot = (end - self.origin) / self.unit_days
        elif self.end is not None:
            if data_cut is not None:
                notes.append("The data cut applies to calendar dates only; the time column holds "
                             f"numbers, so each subject's '{self.end_column}' is used.")
            pot, source = self.end - self.origin, f"each subject's '{self.end_column}'"
        else:
            if data_cut is not None:
                notes.append("The data cut applies to calendar dates only; the time column holds "
                             "numbers.")
            return None, "", tuple(notes)
        if time_max is not None:
            pot = np.minimum(pot, time_max)
        return pot, source, tuple(notes)


@dataclass(frozen=True, eq=False)
class CohortSelection:
    """The included subjects and visits, before any covariate transform or stratification.

    Attributes
    ----------
    panel : Panel
        Response by subject and time since origin (in ``settings.unit``).
    subject_ids : ndarray
        Original subject label of each panel subject code.
    baseline : DataFrame
        One row per subject in code order: ``subject``, each baseline covariate
        (value at the first visit with a value), ``n_visits``, ``first_time``, ``last_time``.
    covariate_kinds : dict
        'numeric' or 'categorical' for each baseline covariate.
    covariate : str or None
        The primary baseline covariate (``settings.covariate`` or the first one listed).
    attrition : Attrition
    warnings : tuple of str
        Problems that did not stop the analysis (e.g. a baseline covariate varying within subject).
    time_label : str
        Axis label for time, with its unit.
    followup : FollowupBasis or None
        Origin and end of follow-up per subject, for the dropout view.
    """

    panel: Panel
    subject_ids: np.ndarray
    baseline: pd.DataFrame
    covariate_kinds: dict
    covariate: str | None
    attrition: Attrition
    warnings: tuple[str, ...]
    roles: Roles
    settings: Settings
    time_label: str
    followup: FollowupBasis | None = None


@dataclass(frozen=True, eq=False)
class PreparedCohort:
    """A selected cohort with its transformed covariate and strata.

    Attributes
    ----------
    selection : CohortSelection
    strata : Strata
        Stratum code per subject (-1 = no value) with labels in the stratifier's own units.
    x : ndarray or None
        Transformed and centred primary covariate per subject (None if it is categorical or absent).
    center_value : float or None
        The value subtracted when centring, on the transformed scale.
    baseline : DataFrame
        ``selection.baseline`` plus ``x``, ``stratum`` and ``stratum_label``.
    """

    #: (not a field) the selection is a cache entry of its own: memory estimates of a cached
    #: cohort leave it out (``analysis.pipeline.deep_nbytes``)
    _cached_apart = ("selection",)

    selection: CohortSelection
    strata: Strata
    x: np.ndarray | None
    center_value: float | None
    baseline: pd.DataFrame
    warnings: tuple[str, ...]
    #: the settings this cohort was built with (those passed to :func:`stratify`); a cached
    #: cohort carries exactly the fields of its cache key (see ``Workbench.cohort``)
    settings: Settings

    # convenience views of the selection
    @property
    def panel(self) -> Panel:
        return self.selection.panel

    @property
    def subject_ids(self) -> np.ndarray:
        return self.selection.subject_ids

    @property
    def attrition(self) -> Attrition:
        return self.selection.attrition

    @property
    def roles(self) -> Roles:
        return self.selection.roles

    @property
    def covariate(self) -> str | None:
        return self.selection.covariate

    @property
    def time_label(self) -> str:
        return self.selection.time_label

    @property
    def response_unit(self) -> str:
        """The response's unit as given with the roles ('' when not given)."""
        return self.roles.response_unit

    @property
    def response_label(self) -> str:
        """Axis label of the response, e.g. 'egfr (mL/min/1.73m²)'."""
        u = self.roles.response_unit
        return f"{self.roles.response} ({u})" if u else self.roles.response

    @property
    def covariate_unit(self) -> str:
        """The unit given with the roles for the first listed covariate, when that is the primary
        one ('' otherwise)."""
        first = self.roles.covariates[0] if self.roles.covariates else None
        return self.roles.covariate_unit if first is not None and self.covariate == first else ""

    @property
    def covariate_label(self) -> str:
        """The primary covariate as the effect statement names it, e.g. 'log2(marker)'."""
        c = self.roles.label(self.covariate) or "covariate"      # its display label
        t = self.settings.transform
        return c if t == "none" else f"{t}({c})"

    @property
    def frame(self) -> pd.DataFrame:
        """Long table in panel row order: subject, time, response, stratum, stratum_label."""
        p = self.panel
        codes = self.strata.codes[p.codes]
        # ids and labels taken from the per-subject table's columns (text arrays made once):
        # the same column as from the object arrays, without converting a string per visit
        return pd.DataFrame({
            "subject": self.baseline["subject"].array.take(p.codes),
            "time": p.time,
            "response": p.y,
            "stratum": codes,
            "stratum_label": self.baseline["stratum_label"].array.take(p.codes),
        })


# --------------------------------------------------------------------------- public API
def prepare(df: pd.DataFrame, roles: Roles, settings: Settings) -> PreparedCohort:
    """Validate, re-anchor, filter and stratify in one call (see module docstring)."""
    return stratify(select_cohort(df, roles, settings), settings)


def select_cohort(df: pd.DataFrame, roles: Roles, settings: Settings, *,
                  tracker: type | None = None,
                  columns: "ColumnReader | None" = None) -> CohortSelection:
    """Validate the table against the roles and apply the inclusion rules.

    Parameters
    ----------
    df : DataFrame
        One row per visit.
    roles : Roles
    settings : Settings
        Reads origin, unit, time_min, time_max, min_visits, require_covariate,
        covariate and duplicates.
    tracker : type, optional, keyword-only
        Counter of the inclusion steps (default :class:`_Tracker`, which stops when a step
        leaves no visit); the cluster engine passes one that lets a partition run empty.
    columns : ColumnReader, optional
        Where the role columns are parsed (subject codes, numbers, dates, column kinds); a
        caching reader (``Workbench``) parses each once per data and roles, so that a
        settings change never re-reads them. Default: parsed here.

    Returns
    -------
    CohortSelection

    Raises
    ------
    DataError
        Missing or all-missing column, non-numeric response, unparseable time or
        event date, event date varying within subject, duplicate visits (with
        ``duplicates='reject'``), or no subject left after a step.
    SettingsError
        A setting that does not fit the data (e.g. origin 'as-is' with a date column).
    """
    ordered = order_visits(df, roles, settings, tracker=tracker, columns=columns)
    return finish_selection(ordered, roles, settings)


@dataclass(frozen=True, eq=False)
class OrderedVisits:
    """:func:`select_cohort`'s work before the per-subject rules (baseline covariate present,
    fewest visits): the visits kept so far in (subject, time) order, each subject's baseline
    values and the inclusion steps counted. It does not depend on ``min_visits`` or
    ``require_covariate``, so a cache keeps it across changes of those two (treat as read-only).
    """

    work: pd.DataFrame
    base: pd.DataFrame
    covariate_kinds: dict
    primary: str | None
    warnings: tuple[str, ...]
    labels: np.ndarray
    time_kind: str
    latest: float
    tracker: "_Tracker"
    #: ``labels`` as a pandas text array when they are all text (None otherwise), so that a
    #: table of subjects takes its ids from it instead of converting Python strings each time
    label_text: "pd.api.extensions.ExtensionArray | None" = None


def order_visits(df: pd.DataFrame, roles: Roles, settings: Settings, *,
                 tracker: type | None = None,
                 columns: "ColumnReader | None" = None) -> OrderedVisits:
    """The first part of :func:`select_cohort` (same parameters): validation, time origin, the
    row-level inclusion steps, the sort and each subject's baseline values. Reads every
    selection setting except ``min_visits`` and ``require_covariate``."""
    _check_columns(df, roles, settings)
    columns = columns or ColumnReader(df)
    # positions, not labels: a filtered or re-indexed table must line up row by row
    df = df.reset_index(drop=True)
    primary = settings.covariate or (roles.covariates[0] if roles.covariates else None)
    covariates = tuple(dict.fromkeys((*roles.covariates, *([primary] if primary else []))))
    if settings.stratify_by and settings.stratify_by not in covariates:
        covariates = (*covariates, settings.stratify_by)

    sid, labels = columns.subject_codes(roles.subject)
    time_kind, time_raw = columns.time_column(roles.time, "time", settings.date_order)
    # the rows in (subject, raw time, row) order, kept per data and roles: the anchored time
    # rises with the raw time within a subject, so the sort below usually finds them in order
    order = columns.visit_order(roles.subject, roles.time, "time", settings.date_order,
                                sid, time_raw)
    # labelled by their row position, as a table in row order would be
    work = pd.DataFrame({"_row": order}, index=pd.Index(order))
    work["subject"] = sid[order]                # rank of the subject's label; -1 = missing
    # the parsed columns keep the table's own index: assigned by position
    work["response"] = columns.numeric(roles.response, "response").to_numpy()[order]
    work["time_raw"] = time_raw.to_numpy()[order]
    if settings.origin == "as-is" and time_kind == "date":
        raise SettingsError(
            f"column '{clip(roles.time)}' holds dates, so time since an origin must be computed: "
            "choose origin 'event-date' (with an event-date column) or 'first-visit'",
            field="origin")
    if settings.origin == "event-date":
        work["event"] = columns.time_values(roles.event_date, "event date", time_kind,
                                            settings.date_order).to_numpy()[order]
    if roles.followup_end:
        work["fu_end"] = columns.time_values(roles.followup_end, "follow-up end", time_kind,
                                             settings.date_order).to_numpy()[order]
    latest = float(_days(work["time_raw"]).max()) if time_kind == "date" else np.nan
    if settings.duplicates == "average":
        # averaged visits keep each covariate's first non-missing value among their rows
        for c in covariates:
            work[f"cov:{c}"] = df[c].to_numpy()[order]

    tracker = (tracker or _Tracker)(work["subject"].to_numpy())
    keep = (work["subject"] >= 0) & work["response"].notna() & work["time_raw"].notna()
    work = work[keep.to_numpy()]
    tracker.record("Subject, time and response all present", work["subject"].to_numpy())

    if settings.origin == "event-date":
        _check_constant_within_subject(work, "event", roles.event_date, "event date", labels)
        work = work[work["event"].notna().to_numpy()]
        tracker.record(f"Event date ({clip(roles.event_date)}) present", work["subject"].to_numpy())
    if roles.followup_end:
        _check_constant_within_subject(work, "fu_end", roles.followup_end, "follow-up end", labels)

    work = work.assign(time=_anchor(work, settings, time_kind))
    work = work[(work["time"] >= 0).to_numpy()]
    tracker.record("Visits at or after the time origin", work["subject"].to_numpy())

    if settings.time_min is not None or settings.time_max is not None:
        lo = -np.inf if settings.time_min is None else settings.time_min
        hi = np.inf if settings.time_max is None else settings.time_max
        work = work[((work["time"] >= lo) & (work["time"] <= hi)).to_numpy()]
        tracker.record(f"Visits inside the time window [{plain_number(lo)}, {plain_number(hi)}] "
                       f"{settings.unit}",
                       work["subject"].to_numpy())

    # one sort by (subject, time), ties in row order; every later step keeps this order
    sub, t, row = work["subject"].to_numpy(), work["time"].to_numpy(), work["_row"].to_numpy()
    if not _in_visit_order(sub, t, row):
        work = work.iloc[np.lexsort((row, t, sub))]
    work = _handle_duplicates(work, roles, settings, labels)
    if settings.duplicates == "average":
        tracker.record("Repeated visits at the same time averaged", work["subject"].to_numpy())

    warnings: list[str] = []
    kinds = {c: ("numeric" if columns.kind(c) == "number" else "categorical") for c in covariates}
    base = _baseline_values(work, covariates, kinds, warnings, labels, df=df, columns=columns)
    return OrderedVisits(work=work, base=base, covariate_kinds=kinds, primary=primary,
                         warnings=tuple(warnings), labels=labels, time_kind=time_kind,
                         latest=latest, tracker=tracker,
                         label_text=columns.subject_text(roles.subject, labels))


def finish_selection(ordered: OrderedVisits, roles: Roles, settings: Settings) -> CohortSelection:
    """The second part of :func:`select_cohort`: the per-subject rules (baseline covariate
    present, fewest visits), the panel and the per-subject table. ``ordered`` is not changed."""
    work, base, kinds, primary = ordered.work, ordered.base, ordered.covariate_kinds, ordered.primary
    labels, time_kind, latest = ordered.labels, ordered.time_kind, ordered.latest
    warnings = list(ordered.warnings)
    tracker = ordered.tracker.copy()
    # both rules keep or drop whole subjects: counted on the subject codes, applied at once
    sub = work["subject"].to_numpy()
    kept = np.ones(sub.size, dtype=bool)
    if primary and settings.require_covariate:
        has = np.zeros(len(labels), dtype=bool)
        has[base.index[base[primary].notna()].to_numpy()] = True
        kept = has[sub]
        tracker.record(f"Baseline {clip(primary)} present", sub[kept])

    n_visits = np.bincount(sub[kept], minlength=len(labels))
    kept &= n_visits[sub] >= settings.min_visits
    tracker.record(f"At least {settings.min_visits} visit{'s' if settings.min_visits > 1 else ''}",
                   sub[kept])
    work = work[kept]

    # rows are sorted by subject: the distinct subjects and their codes from where it changes
    sub = sub[kept]
    change = np.r_[True, sub[1:] != sub[:-1]]
    ranks, codes = sub[change], np.cumsum(change) - 1
    panel = Panel.from_codes(codes, work["time"].to_numpy(float), work["response"].to_numpy(float))
    ids = labels[ranks]
    baseline = base.reindex(ranks)
    baseline.index.name = None
    baseline.insert(0, "subject", ids if ordered.label_text is None
                    else ordered.label_text.take(ranks))
    baseline = baseline.reset_index(drop=True)
    baseline["n_visits"] = panel.counts
    baseline["first_time"] = panel.time[panel.starts]
    baseline["last_time"] = panel.time[panel.starts + panel.counts - 1]
    return CohortSelection(
        panel=panel, subject_ids=ids, baseline=baseline, covariate_kinds=kinds,
        covariate=primary, attrition=tracker.result(), warnings=tuple(warnings),
        roles=roles, settings=settings, time_label=_time_label(roles, settings),
        followup=_followup_basis(work, codes, roles, settings, time_kind, latest, labels),
    )


def stratify(selection: CohortSelection, settings: Settings) -> PreparedCohort:
    """Transform and centre the primary covariate and cut the stratifier into strata.

    Reads transform, center, stratify_by, strata_method, n_strata and breaks.
    A categorical stratifier's levels are the strata; a numeric one is cut by
    ``strata_method``. Equal-width groups of the primary covariate are cut on
    the transformed scale (equal widths in log2 for ``transform="log2"``);
    quantile groups are the same on any monotone scale, and custom breaks are
    in the covariate's own units. Labels always read in the covariate's own
    units. A stratifier other than the primary covariate is not transformed.
    """
    base = selection.baseline.copy()
    warnings = list(selection.warnings)
    primary = selection.covariate
    x = center_value = None
    if primary is not None and selection.covariate_kinds[primary] == "numeric":
        raw = base[primary].to_numpy(float)
        xt = transform_values(raw, settings.transform, name=primary)
        x, center_value = center_values(xt, settings.center)
        base["x"] = x
    elif primary is not None and settings.transform != "none":
        raise SettingsError(
            f"transform == {settings.transform!r} needs a numeric covariate, "
            f"but '{clip(primary)}' is categorical; choose transform 'none'", field="transform")
    by = settings.stratify_by or primary
    m = len(base)
    if by is None:
        strata = categorical_strata(np.array(["All subjects"] * m, dtype=object), name="all subjects")
    elif selection.covariate_kinds[by] == "numeric":
        strata = cut_strata(base[by].to_numpy(float), method=settings.strata_method,
                            n=settings.n_strata, breaks=settings.breaks, name=by,
                            transform=settings.transform if by == primary else "none")
    else:
        strata = categorical_strata(base[by].to_numpy(object), name=by)
    labels = np.asarray(tuple(strata.labels) + (MISSING_LABEL,), dtype=object)
    base["stratum"] = strata.codes
    base["stratum_label"] = _text_take(labels, strata.codes)
    warnings.extend(getattr(strata, "notes", ()))
    return PreparedCohort(selection=selection, strata=strata, x=x, center_value=center_value,
                          baseline=base, warnings=tuple(warnings), settings=settings)


#: the dtype pandas gives an object array of strings
_INFERRED_TEXT = pd.Series(np.array(["a"], dtype=object)).dtype


def _small_ints(codes: np.ndarray) -> np.ndarray:
    """Integer codes (-1 and up) in the smallest signed type that holds them (the same values;
    a million rows of a few categories keep 1 MB instead of 8)."""
    top = int(codes.max(initial=0))
    for kind in (np.int8, np.int16, np.int32):
        if top <= np.iinfo(kind).max:
            return codes.astype(kind)
    return codes


def _text_take(labels: np.ndarray, codes: np.ndarray):
    """``labels[codes]`` (numpy indexing: -1 is the last label) as the column pandas makes of
    it: taken from a pandas text array when the labels are all text (one conversion of the
    few labels instead of one per row)."""
    inferred = pd.Series(labels)
    if isinstance(inferred.dtype, pd.StringDtype):
        return inferred.array.take(np.asarray(codes, dtype=np.int64))
    return labels[codes]


# --------------------------------------------------------------------------- column parsing
class ColumnReader:
    """Parses the role columns of one table for :func:`select_cohort`.

    Each answer depends only on the table, the column, its role and the date order, never on
    the other settings; ``memo(key, compute)`` (default: compute every time) lets a cache keep
    them, so that changing, say, the fewest visits re-runs the inclusion rules on parsed
    arrays instead of re-reading text and dates. A parse that fails raises its message each
    time it is asked (failures are not kept). Treat the returned arrays as read-only.
    """

    def __init__(self, df: pd.DataFrame, memo=None):
        self._df = df
        self._memo = memo or (lambda key, compute: compute())

    def subject_codes(self, column: str) -> tuple[np.ndarray, np.ndarray]:
        """(code per row, distinct labels), see :func:`_subject_codes`."""
        return self._memo(("subject", column), lambda: _subject_codes(self._df[column]))

    def numeric(self, column: str, role: str) -> pd.Series:
        """Finite numbers as float (see :func:`_numeric`)."""
        return self._memo(("numeric", column, role),
                          lambda: _numeric(self._df[column], column, role, finite=True))

    def time_column(self, column: str, role: str, order: str) -> tuple[str, pd.Series]:
        return self._memo(("time", column, role, order),
                          lambda: _time_column(self._df[column], column, role, order))

    def time_values(self, column: str, role: str, kind: str, order: str) -> pd.Series:
        return self._memo(("time values", column, role, kind, order),
                          lambda: _time_values(self._df[column], column, role, kind, order))

    def subject_text(self, column: str, labels: np.ndarray):
        """The distinct subject ``labels`` (:meth:`subject_codes`) as a pandas text array when
        pandas reads them as text, else None (taking from it gives the column a table of
        those labels would get)."""
        def compute():
            inferred = pd.Series(labels)
            return inferred.array if isinstance(inferred.dtype, pd.StringDtype) else None

        return self._memo(("subject text", column), compute)

    def visit_order(self, subject: str, time: str, role: str, order: str,
                    codes: np.ndarray, raw: pd.Series) -> np.ndarray:
        """Row positions sorted by subject code, then raw time (missing last), then row: a
        stable sort by (subject, raw time); ``codes`` and ``raw`` are those columns as this
        reader parsed them (:meth:`subject_codes`, :meth:`time_column`)."""
        return self._memo(("visit order", subject, time, role, order),
                          lambda: np.lexsort((raw.to_numpy(), codes)).astype(np.int64))

    def category_codes(self, column: str) -> np.ndarray:
        """Integer code of each row's value (equal values, equal codes; -1 = missing)."""
        return self._memo(("codes", column),
                          lambda: _small_ints(pd.factorize(self._df[column],
                                                           use_na_sentinel=True)[0]))

    def kind(self, column: str) -> str:
        """'number', 'date' or 'text' (:func:`analysis.loading.column_kind`)."""
        return self._memo(("kind", column), lambda: column_kind(self._df[column]))


# --------------------------------------------------------------------------- helpers
class _Tracker:
    """Counts subjects and observations after each inclusion step."""

    def __init__(self, subjects_all: np.ndarray):
        """``subjects_all``: subject code per row (-1 = no subject)."""
        n_sub = int(np.count_nonzero(np.bincount(subjects_all[subjects_all >= 0] + 0)))
        self._steps = [AttritionStep("All rows read", n_sub, int(len(subjects_all)), 0, 0)]

    def record(self, name: str, subjects: np.ndarray) -> None:
        prev = self._steps[-1]
        n_sub = int(np.count_nonzero(np.bincount(subjects))) if len(subjects) else 0
        n_obs = int(len(subjects))
        self._steps.append(AttritionStep(name, n_sub, n_obs, prev.subjects - n_sub,
                                         prev.observations - n_obs))
        if n_obs == 0:
            raise DataError(f"no visits remain after the inclusion step '{name}'; "
                            "check the column roles and settings")

    def result(self) -> Attrition:
        return Attrition(tuple(self._steps))

    def copy(self) -> "_Tracker":
        """The same counter with its own list of steps (recording on it leaves this one)."""
        twin = copy.copy(self)
        twin._steps = list(self._steps)
        return twin


def _check_columns(df: pd.DataFrame, roles: Roles, settings: Settings) -> None:
    if not isinstance(df, pd.DataFrame):
        raise TypeError(f"data must be a pandas DataFrame, not {type(df).__name__}")
    if len(df) == 0:
        raise DataError("the table has no rows")
    named = [("subject", roles.subject), ("time", roles.time), ("response", roles.response)]
    named += [("baseline covariate", c) for c in roles.covariates]
    if settings.origin == "event-date":
        if not roles.event_date:
            raise SettingsError("origin == 'event-date' needs an event-date column role",
                                field="origin")
        named.append(("event date", roles.event_date))
    if roles.followup_end:
        named.append(("follow-up end", roles.followup_end))
    if settings.covariate:
        named.append(("covariate", settings.covariate))
    if settings.stratify_by:
        named.append(("stratify by", settings.stratify_by))
    available = ", ".join(f"'{clip(c, 60)}'" for c in df.columns[:30])
    if len(df.columns) > 30:
        available += f" and {len(df.columns) - 30} more"
    for role, col in named:
        if col not in df.columns:
            raise DataError(f"column '{clip(col)}' ({role}) is not in the table; "
                            f"columns are {available}", column=col)
        if df[col].isna().all():
            raise DataError(f"column '{clip(col)}' ({role}) has no values in any row", column=col)
        nested = nested_cells(df[col])
        if nested.any():
            rows = np.flatnonzero(nested)
            raise DataError(
                f"column '{clip(col)}' ({role}) holds lists or records (e.g. a Parquet list or "
                f"struct column) in {row_list(rows)}; a role column must hold plain numbers, "
                "dates or text", column=col, positions=rows[:20])
    roles_used = [c for _, c in named[:3]]
    if len(set(roles_used)) < 3:
        raise DataError("subject, time and response must be three different columns",
                        column=roles.subject)


def _subject_codes(s: pd.Series) -> tuple[np.ndarray, np.ndarray]:
    """(code per row, distinct labels in sorted order): code = the label's rank, -1 if missing.

    Labels are the stripped text (empty = missing), integers kept exact (long ids never pass
    through a float, so two ids above 2**53 never merge), or for a float column whole values
    as integers and any other value (1.5, inf) as its text. The cleaning runs on the distinct
    raw values only, so it costs little on long tables; raw values that clean to the same
    label (e.g. 'A' and 'A ') share one code.
    """
    integer = pd.api.types.is_integer_dtype(s) and not pd.api.types.is_bool_dtype(s)
    floating = pd.api.types.is_float_dtype(s)
    # factorize plain arrays: uniques come back as an array, without building a pandas Index
    if integer:
        raw_codes, raw_uniq = pd.factorize(s, use_na_sentinel=True)
        clean = pd.Series([int(x) for x in raw_uniq], dtype=object)
    elif floating:
        raw_codes, raw_uniq = pd.factorize(s.to_numpy(dtype=float, na_value=np.nan),
                                           use_na_sentinel=True)
        v = np.asarray(raw_uniq, dtype=float)
        clean = pd.Series([int(x) if np.isfinite(x) and x == int(x) else repr(float(x))
                           for x in v], dtype=object)
    else:
        raw = s.to_numpy(dtype=object, na_value=None)
        raw_codes, raw_uniq = pd.factorize(raw, use_na_sentinel=True)
        text = pd.Series(raw_uniq, dtype=object).astype("string").str.strip()
        clean = text.mask(text == "").astype(object).where(text.notna() & (text != ""), None)
    clean_codes, clean_uniq = pd.factorize(clean.to_numpy(dtype=object), use_na_sentinel=True)
    uniq = list(clean_uniq)
    if all(isinstance(v, str) for v in uniq):
        order = np.argsort(np.asarray(uniq, dtype=str), kind="stable")
    else:
        order = np.asarray(sorted(range(len(uniq)), key=lambda i: _sort_key(uniq[i])), dtype=np.int64)
    rank = np.empty(len(uniq), dtype=np.int64)
    rank[order] = np.arange(len(order))
    per_raw = np.where(clean_codes >= 0, rank[np.maximum(clean_codes, 0)], -1)
    rows = np.where(raw_codes >= 0, per_raw[np.maximum(raw_codes, 0)], -1).astype(np.int64)
    labels = np.empty(len(order), dtype=object)
    labels[:] = [uniq[i] for i in order]
    return rows, labels


def _numeric(s: pd.Series, column: str, role: str, *, finite: bool = False) -> pd.Series:
    """Numbers as float; empty cells → NaN; a decimal comma is read as a decimal point;
    anything else non-numeric → DataError. With ``finite``, also 'inf', '-inf', 'nan' written
    as text and numbers too large for a float (1e309) → DataError."""
    if pd.api.types.is_numeric_dtype(s) and not pd.api.types.is_bool_dtype(s):
        out = s.astype(float)
        text = None
    else:
        text = s.astype("string").str.strip()
        text = text.mask(text == "")
        out = pd.to_numeric(text, errors="coerce")
        bad = out.isna() & text.notna()
        if bad.any():
            nonfinite = text[bad].str.lower().isin(NON_FINITE_TEXT)
            fixable = (decimal_comma_numbers(text[bad][~nonfinite]) is not None
                       if (~nonfinite).any() else True)
            if fixable:
                out = out.copy()
                rest = bad.copy()
                rest[bad] = ~nonfinite.to_numpy()
                if rest.any():
                    out[rest] = decimal_comma_numbers(text[rest])
            else:
                rows = np.flatnonzero(bad.to_numpy())
                raise DataError(
                    f"column '{clip(column)}' ({role}) must hold numbers; "
                    f"{rows_hold(rows, text[bad].unique()[:3])}",
                    column=column, positions=rows[:20])
        out = out.astype(float)
    if finite:
        flag = np.isinf(out.to_numpy(dtype=float, na_value=np.nan))
        if text is not None:
            flag |= text.str.lower().isin(NON_FINITE_TEXT).fillna(False).to_numpy(dtype=bool)
        if flag.any():
            rows = np.flatnonzero(flag)
            shown = (text[flag] if text is not None else out[flag]).unique()[:3]
            raise DataError(
                f"column '{clip(column)}' ({role}) must hold finite numbers; "
                f"{rows_hold(rows, shown)} (infinite, too large, or 'not a number'); "
                "leave a cell empty when the value is missing", column=column, positions=rows[:20])
    return out


def _time_column(s: pd.Series, column: str, role: str, order: str) -> tuple[str, pd.Series]:
    """('date' or 'number', the values), each cell parsed once.

    A column that is mostly dates counts as dates, so the few cells that do not parse are
    reported by row rather than the whole column being called non-numeric."""
    if pd.api.types.is_datetime64_any_dtype(s):
        return "date", read_dates(s, order=order, column=column, role=role)
    if pd.api.types.is_numeric_dtype(s) and not pd.api.types.is_bool_dtype(s):
        return "number", _numeric(s, column, role, finite=True)
    # the kind is told from a spread-out sample; the whole column is converted once, below
    values = s.dropna()
    sample = values.iloc[:: max(1, len(values) // 500)].astype("string").str.strip()
    sample = sample[sample != ""]
    numeric = pd.to_numeric(sample, errors="coerce").notna().mean() if len(sample) else 0.0
    if numeric < 1.0 and decimal_comma_numbers(sample) is None:
        if date_fraction(sample, order) > max(numeric, 0.5):
            return "date", read_dates(s, order=order, column=column, role=role)
    return "number", _numeric(s, column, role, finite=True)


def _time_values(s: pd.Series, column: str, role: str, kind: str, order: str) -> pd.Series:
    if kind == "number":
        if column_kind(s) == "date":
            raise DataError(f"column '{clip(column)}' ({role}) holds dates but the time column "
                            "holds numbers; both must be numbers or both dates", column=column)
        return _numeric(s, column, role, finite=True)
    return read_dates(s, order=order, column=column, role=role)


def _in_visit_order(subject: np.ndarray, time: np.ndarray, row: np.ndarray) -> bool:
    """Whether the rows are sorted by subject, then time, then row (what a stable sort by
    (subject, time) of a table in row order gives)."""
    if subject.size < 2:
        return True
    ds, dt = np.diff(subject), np.diff(time)
    return bool(np.all((ds > 0) | ((ds == 0) & ((dt > 0) | ((dt == 0) & (np.diff(row) > 0))))))


def _check_constant_within_subject(work: pd.DataFrame, col: str, column: str, role: str,
                                   labels: np.ndarray) -> None:
    n = work.groupby("subject", sort=True)[col].nunique(dropna=True)
    varying = n.index[n > 1]
    if len(varying):
        first = work[work["subject"].isin(varying[:1])]
        raise DataError(
            f"column '{clip(column)}' ({role}) must be the same on every row of a subject; it "
            f"varies for {len(varying)} subject(s), e.g. "
            f"{', '.join(map(clip, labels[varying[:3]]))} "
            f"({row_list(np.sort(first['_row'].to_numpy()))})",
            column=column, positions=np.sort(first["_row"].to_numpy())[:20])


def _anchor(work: pd.DataFrame, settings: Settings, kind: str) -> np.ndarray:
    t = work["time_raw"]
    if settings.origin == "event-date":
        delta = t - work["event"]
    elif settings.origin == "first-visit":
        delta = t - work.groupby("subject", sort=False)["time_raw"].transform("min")
    else:
        return t.to_numpy(float)
    if kind == "date":
        return (delta.dt.total_seconds() / 86400.0 / opt.DAYS_PER_UNIT[settings.unit]).to_numpy(float)
    return delta.to_numpy(float)


def _days(s: pd.Series) -> np.ndarray:
    """Dates as float days since 1970-01-01 (NaT → NaN)."""
    v = pd.to_datetime(s).to_numpy("datetime64[ns]")
    out = v.astype("int64").astype(float) / 86_400e9
    out[np.isnat(v)] = np.nan
    return out


def _day_text(day: float) -> str:
    return str(np.datetime64(int(np.floor(day)), "D"))


def _followup_basis(work: pd.DataFrame, codes: np.ndarray, roles: Roles, settings: Settings,
                    kind: str, latest: float, labels: np.ndarray) -> FollowupBasis:
    """Per-subject origin (time column's scale) = raw time minus anchored time, first row of each
    subject; the follow-up end likewise. ``work`` and ``codes`` are in panel row order."""
    first = np.flatnonzero(np.r_[True, codes[1:] != codes[:-1]])   # codes are sorted
    scale = opt.DAYS_PER_UNIT[settings.unit] if kind == "date" else 1.0
    # elementwise, so computed on each subject's first row only
    lead = work.iloc[first]
    raw = _days(lead["time_raw"]) if kind == "date" else lead["time_raw"].to_numpy(float)
    origin = raw - lead["time"].to_numpy(float) * scale
    end = None
    if roles.followup_end:
        fu = lead["fu_end"]
        end = _days(fu) if kind == "date" else fu.to_numpy(float)
        if kind == "number" and np.isnan(end).any():
            miss = np.flatnonzero(np.isnan(end))
            rows = work["_row"].to_numpy()[first[miss]]
            raise DataError(
                f"column '{roles.followup_end}' (follow-up end) is empty for {miss.size} "
                f"subject(s), e.g. {', '.join(map(str, labels[np.unique(work['subject'].to_numpy())[miss[:3]]]))} "
                f"({row_list(rows)}); with numeric times every subject needs its end of "
                "follow-up (or leave the role empty)", column=roles.followup_end,
                positions=rows[:20])
    return FollowupBasis(kind=kind, origin=origin, end=end, latest=latest,
                         unit_days=scale, end_column=roles.followup_end)


def _handle_duplicates(work: pd.DataFrame, roles: Roles, settings: Settings,
                       labels: np.ndarray) -> pd.DataFrame:
    """``work`` is sorted by (subject, time), so repeats are neighbours."""
    sid, t = work["subject"].to_numpy(), work["time"].to_numpy(float)
    same = (np.diff(sid) == 0) & (np.diff(t) == 0)
    if not same.any():
        return work
    flag = np.zeros(len(work), dtype=bool)
    flag[1:][same] = True
    flag[:-1][same] = True
    dup = pd.Series(flag, index=work.index)
    if settings.duplicates == "reject":
        rows = work.loc[dup, "_row"].to_numpy()
        first = labels[work.loc[dup, "subject"].iloc[0]]
        raise DataError(
            f"{int(dup.sum())} rows repeat a (subject, time) pair already present, e.g. subject "
            f"{clip(first)} ({row_list(rows)}); remove them, or choose duplicates 'average' to use "
            "the mean response of each repeated visit", column=roles.time, positions=rows[:20])
    agg = {c: "first" for c in work.columns if c not in ("subject", "time", "response")}
    agg["response"] = "mean"
    return work.groupby(["subject", "time"], sort=False, as_index=False).agg(agg)


def _baseline_values(work: pd.DataFrame, covariates, kinds, warnings: list,
                     labels: np.ndarray, *, df: pd.DataFrame | None = None,
                     columns: ColumnReader | None = None) -> pd.DataFrame:
    """First non-missing value in time order per subject (indexed by subject code); warn when
    a covariate varies. ``work`` is sorted by (subject, time); a covariate not carried in
    ``work`` (as ``cov:NAME``) is read from ``df`` at the rows ``work['_row']``, a categorical
    one through its integer codes (``columns.category_codes``)."""
    ordered = work
    subject = ordered["subject"].to_numpy()
    # sorted by subject: the distinct codes are where it changes
    out = pd.DataFrame(index=pd.Index(subject[np.r_[True, subject[1:] != subject[:-1]]]
                                      if subject.size else np.unique(subject)))
    for c in covariates:
        col = f"cov:{c}"
        plain_numbers = (pd.api.types.is_numeric_dtype(df[c])
                         and not pd.api.types.is_bool_dtype(df[c])) if df is not None else False
        if col not in ordered.columns and (kinds[c] != "numeric" or plain_numbers):
            _coded_baseline(ordered, df, columns or ColumnReader(df), c, out, warnings, labels,
                            as_float=kinds[c] == "numeric")
            continue
        values = (ordered[col] if col in ordered.columns else pd.Series(
            df[c].to_numpy()[ordered["_row"].to_numpy()], index=ordered.index))
        if kinds[c] == "numeric":
            values = _numeric(values.reset_index(drop=True), c, "baseline covariate")
            values.index = ordered.index
        frame = pd.DataFrame({"subject": ordered["subject"], "v": values})
        g = frame.groupby("subject", sort=True)["v"]
        out[c] = g.first().reindex(out.index)
        n = g.nunique(dropna=True)
        varying = n.index[n > 1]
        if len(varying):
            warnings.append(
                f"baseline covariate '{clip(c)}' changes within {len(varying)} subject(s) "
                f"(e.g. {', '.join(map(clip, labels[varying[:3]]))}); "
                "the first visit's value is used")
    return out


def _coded_baseline(ordered: pd.DataFrame, df: pd.DataFrame, columns: ColumnReader, c: str,
                    out: pd.DataFrame, warnings: list, labels: np.ndarray, *,
                    as_float: bool = False) -> None:
    """:func:`_baseline_values` for one categorical covariate (or a numeric column with
    ``as_float``), on integer codes: the same first values and the same warning as grouping
    the values themselves."""
    rows = ordered["_row"].to_numpy()
    subject = ordered["subject"].to_numpy()
    codes = columns.category_codes(c)[rows]
    present = codes >= 0
    if present.all():           # a column without gaps: no copies
        s, k, at = subject, codes, rows
    else:
        s, k, at = subject[present], codes[present], rows[present]
    # rows are sorted by subject: a subject's first row is where the subject changes
    first = np.flatnonzero(np.r_[True, s[1:] != s[:-1]]) if s.size else np.zeros(0, np.int64)
    picked = df[c].take(at[first])
    # text as pandas reads an object array of it is kept as such (no round trip through
    # Python strings); anything else through numpy, as before
    values = pd.Series(picked.to_numpy(dtype=float) if as_float
                       else picked.array if picked.dtype == _INFERRED_TEXT
                       else picked.to_numpy(), index=s[first])
    out[c] = values.reindex(out.index)
    # a subject holds more than one distinct code exactly when two of its neighbouring rows
    # hold different codes
    differs = s[1:][(s[1:] == s[:-1]) & (k[1:] != k[:-1])]
    varying = differs[np.r_[True, differs[1:] != differs[:-1]]] if differs.size else differs
    if len(varying):
        warnings.append(
            f"baseline covariate '{clip(c)}' changes within {len(varying)} subject(s) "
            f"(e.g. {', '.join(map(clip, labels[varying[:3]]))}); "
            "the first visit's value is used")


def _sort_key(v):
    return (0, v, "") if isinstance(v, (int, float)) else (1, 0, str(v))


def _time_label(roles: Roles, settings: Settings) -> str:
    unit = settings.unit.capitalize()
    if settings.origin == "event-date":
        return f"{unit} since {roles.label(roles.event_date)}"
    if settings.origin == "first-visit":
        return f"{unit} since first visit"
    return f"{roles.label(roles.time)} ({settings.unit})"
