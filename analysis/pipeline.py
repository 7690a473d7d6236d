"""The cached analysis layer shared by the dashboard and the command line.

A :class:`Workbench` memoises each stage of the exploratory analysis under the
data's content hash, the column roles and only the settings that stage reads,
so that changing, say, the number of variogram bins re-bins the pairs but does
not refit the per-subject lines or re-read the table.

Stages and the settings they read (see :data:`analysis.settings.STAGE_FIELDS`)::

    ordered       origin, unit, window, covariate, duplicates, date order (the visits kept,
                  sorted, with each subject's baseline values: the selection before its
                  per-subject rules)
    selection     ordered + min visits, require covariate
    cohort        selection + transform, centring, stratifier and its cut
    subject_fits  selection
    residuals     selection + detrending (+ strata when detrending within strata)
    variogram     residuals + bins, maximum lag
    lagcorr       residuals + window width
    summaries     cohort + data cut (dropout view)
    models        cohort + the model choices (structures, correlation, REML/ML,
                  confounders, spline in time, GEE rows; see analysis.models.modelstage)
"""
from __future__ import annotations

import sys
import threading
from collections import Counter, OrderedDict
from dataclasses import dataclass
from typing import Any, Callable

import numpy as np
import pandas as pd

from .errors import SettingsError
from .jsonsafe import json_safe
from .preparation.loading import Dataset
from .preparation.prepare import (CohortSelection, ColumnReader, PreparedCohort,
                                  stratify)
from .preparation.prepare import OrderedVisits, finish_selection, order_visits
from .settings import COUNT_LIMITS, STAGE_FIELDS, Roles, Settings, json_key


def check_group_limit(selection: CohortSelection, settings: Settings) -> None:
    """Groups cut from a numeric stratifier: at most one per subject (checked before cutting)."""
    by = settings.stratify_by or selection.covariate
    if by is None or selection.covariate_kinds.get(by) != "numeric" \
            or settings.strata_method == "custom":
        return
    n = selection.panel.n_subjects
    if settings.n_strata > n:
        hi = min(n, COUNT_LIMITS["n_strata"])
        raise SettingsError(f"Number of groups ({settings.n_strata}) is more than the cohort's "
                            f"{n:,} subjects; choose from 1 to {hi}.", field="n_strata")


#: object arrays (and tables) up to this many elements (rows) are sized exactly; longer ones
#: from an even sample of ``SIZE_SAMPLE`` elements (sizing every text of a million-row table
#: cost tens of ms per cached result)
SIZE_EXACT = 50_000
SIZE_SAMPLE = 5_000


def _objects_nbytes(values: np.ndarray) -> int:
    """``values.nbytes`` plus the Python objects it points to (estimated from an even sample
    when there are more than :data:`SIZE_EXACT`)."""
    flat = values.ravel()
    if flat.size <= SIZE_EXACT:
        return int(flat.nbytes) + sum(sys.getsizeof(v) for v in flat)
    sample = flat[::flat.size // SIZE_SAMPLE]
    return int(flat.nbytes) + int(sum(sys.getsizeof(v) for v in sample) * flat.size / sample.size)


def _column_nbytes(values) -> int:
    """Memory of one table column or index of more than :data:`SIZE_EXACT` rows."""
    if isinstance(values, pd.Series):
        values = values.array
    if isinstance(values, pd.Categorical):
        return int(values.codes.nbytes) + _column_nbytes(values.categories)
    if isinstance(values, pd.Index) and not isinstance(values, pd.RangeIndex):
        values = values.array
    if isinstance(values, pd.arrays.NumpyExtensionArray) or isinstance(values, np.ndarray):
        array = np.asarray(values)
        return _objects_nbytes(array) if array.dtype == object else int(array.nbytes)
    return int(values.memory_usage(deep=True)) if isinstance(values, pd.Index) \
        else int(values.nbytes)


def deep_nbytes(obj, _seen: set | None = None, _depth: int = 0) -> int:
    """Estimated memory held by a result: numpy ``nbytes``, pandas ``memory_usage(deep=True)``,
    recursing into dataclasses, objects' attributes and containers (each object counted once;
    texts of long columns estimated from a sample, see :data:`SIZE_EXACT`)."""
    seen = set() if _seen is None else _seen
    if id(obj) in seen or _depth > 12:
        return 0
    seen.add(id(obj))
    if isinstance(obj, np.ndarray):
        if obj.dtype == object:
            return _objects_nbytes(obj)
        return int(obj.nbytes) if obj.base is None else 0 if id(obj.base) in seen \
            else deep_nbytes(obj.base, seen, _depth + 1) or int(obj.nbytes)
    if isinstance(obj, pd.DataFrame):
        if len(obj) <= SIZE_EXACT:
            return int(obj.memory_usage(deep=True, index=True).sum())
        return _column_nbytes(obj.index) + sum(_column_nbytes(obj.iloc[:, i])
                                               for i in range(obj.shape[1]))
    if isinstance(obj, (pd.Series, pd.Index)):
        if len(obj) <= SIZE_EXACT:
            return int(obj.memory_usage(deep=True))
        return _column_nbytes(obj) + (_column_nbytes(obj.index)
                                      if isinstance(obj, pd.Series) else 0)
    if isinstance(obj, (str, bytes, int, float, bool, type(None))):
        return sys.getsizeof(obj)
    if isinstance(obj, dict):
        return sys.getsizeof(obj) + sum(deep_nbytes(k, seen, _depth + 1)
                                        + deep_nbytes(v, seen, _depth + 1) for k, v in obj.items())
    if isinstance(obj, (list, tuple, set, frozenset)):
        return sys.getsizeof(obj) + sum(deep_nbytes(v, seen, _depth + 1) for v in obj)
    size = sys.getsizeof(obj)
    attrs = getattr(obj, "__dict__", None)
    if attrs is not None:
        # attributes that are cache entries of their own (e.g. a cohort's selection) are
        # counted there, not again in every result that refers to them
        apart = getattr(type(obj), "_cached_apart", ())
        size += sum(deep_nbytes(v, seen, _depth + 1) for k, v in attrs.items() if k not in apart)
    for name in getattr(type(obj), "__slots__", ()):
        size += deep_nbytes(getattr(obj, name, None), seen, _depth + 1)
    return size


class ResultCache:
    """A bounded, thread-safe least-recently-used memo.

    Two sessions asking for the same key share the result (keys include the
    data's content hash, so different data never collide); nothing else is shared.
    Bounded by entry count and, when ``max_bytes`` is given, by the estimated memory of the
    results (:func:`deep_nbytes`): the least recently used entries go first, and the newest
    entry is always kept (a single result larger than the budget is still returned).
    """

    def __init__(self, max_entries: int = 128, max_bytes: int | None = None,
                 sizer: Callable[[Any], int] = deep_nbytes):
        if max_entries < 1:
            raise ValueError(f"max_entries == {max_entries}, must be >= 1")
        if max_bytes is not None and max_bytes < 1:
            raise ValueError(f"max_bytes == {max_bytes}, must be >= 1")
        self.max_entries = max_entries
        self.max_bytes = max_bytes
        self._sizer = sizer
        self._items: OrderedDict = OrderedDict()
        self._sizes: dict = {}
        self._running: dict = {}      # key -> Event of a computation in progress
        self.nbytes = 0
        self._lock = threading.Lock()

    def get_or_compute(self, key, compute: Callable[[], Any]) -> tuple[Any, bool]:
        """Return (value, computed_now).

        Computed once when several threads ask for the same key at the same time (the page's
        callbacks run in parallel and share stages): the others wait for the first one's
        result. When that computation fails, each waiter tries for itself (and meets the same
        message).
        """
        while True:
            with self._lock:
                if key in self._items:
                    self._items.move_to_end(key)
                    return self._items[key], False
                running = self._running.get(key)
                if running is None:
                    running = self._running[key] = threading.Event()
                    break
            running.wait()
        try:
            value = compute()
        except BaseException:
            with self._lock:
                self._running.pop(key, None)
            running.set()
            raise
        size = self._sizer(value) if self.max_bytes is not None else 0
        with self._lock:
            self._running.pop(key, None)
            running.set()
            if key in self._items:
                self.nbytes -= self._sizes.pop(key, 0)
            self._items[key] = value
            self._sizes[key] = size
            self.nbytes += size
            self._items.move_to_end(key)
            while len(self._items) > 1 and (
                    len(self._items) > self.max_entries
                    or (self.max_bytes is not None and self.nbytes > self.max_bytes)):
                old, _ = self._items.popitem(last=False)
                self.nbytes -= self._sizes.pop(old, 0)
        return value, True

    def __contains__(self, key) -> bool:
        with self._lock:
            return key in self._items

    def __len__(self) -> int:
        return len(self._items)

    def clear(self) -> None:
        with self._lock:
            self._items.clear()
            self._sizes.clear()
            self.nbytes = 0


@dataclass(frozen=True, eq=False)
class Summaries:
    """Stratum table, slope-vs-covariate smooth and the dropout view's data."""

    stratum_table: pd.DataFrame
    slope_smooth: pd.DataFrame
    dropout: Any


@dataclass(frozen=True, eq=False)
class Exploration:
    """Every exploratory result for one (data, roles, settings); ``settings`` are the request's
    own (the cached stages carry only the fields of their keys)."""

    settings: Settings
    cohort: PreparedCohort
    subject_lines: pd.DataFrame
    residuals: Any
    variogram: Any
    lag_correlation: Any
    summaries: Summaries

    def to_json(self) -> dict:
        """Plain JSON-ready dict (the ``cohortlens summarize`` output; schema in README)."""
        c = self.cohort
        lines = self.subject_lines
        return json_safe({
            "settings": self.settings.to_dict(),
            "roles": c.roles.to_dict(),
            "cohort": {
                "subjects": c.panel.n_subjects,
                "observations": c.panel.n_obs,
                "time_label": c.time_label,
                "covariate": c.covariate,
                "center_value": c.center_value,
            },
            "warnings": list(c.warnings),
            "attrition": c.attrition.to_json(),
            "subjects": lines.to_dict(orient="records"),
            "residuals": {"method": self.residuals.description},
            "semivariogram": self.variogram.to_json(),
            "lag_correlation": self.lag_correlation.to_json(),
            "strata": self.summaries.stratum_table.to_dict(orient="records"),
            "strata_definition": c.strata.to_frame().to_dict(orient="records"),
            "slope_vs_covariate": self.summaries.slope_smooth.to_dict(orient="records"),
            "dropout": self.summaries.dropout.to_json(),
        })


class Workbench:
    """Memoised exploratory analysis; one instance serves every browser session.

    Parameters
    ----------
    max_entries : int
        Bound on cached exploratory results (all those stages together).
    max_model_sets : int
        Bound on cached fitted model sets (the ``models`` stage).
    max_bytes : int or None
        Memory budget of the cached results (estimated by :func:`deep_nbytes`); three
        quarters go to the exploratory stages (a quarter of that to the parsed role columns,
        bounded on their own), one quarter to fitted model sets. None: no byte bound (the
        entry counts only).

    Attributes
    ----------
    compute_counts : collections.Counter
        How many times each stage was actually computed (cache misses).
    """

    def __init__(self, max_entries: int = 128, max_model_sets: int = 8,
                 max_bytes: int | None = None):
        explore_bytes = None if max_bytes is None else max(1, max_bytes * 3 // 4)
        model_bytes = None if max_bytes is None else max(1, max_bytes - explore_bytes)
        # the parsed role columns (a quarter of the exploratory share) are bounded apart from
        # the results, so that a run of settings changes never pushes them out (a large file's
        # dates would be parsed again)
        column_bytes = None if explore_bytes is None else max(1, explore_bytes // 4)
        self._columns = ResultCache(max(64, max_entries), column_bytes)
        self._cache = ResultCache(max_entries, None if explore_bytes is None
                                  else max(1, explore_bytes - column_bytes))
        # fitted model sets keep their data and are slow to make: a bound of their own
        self._model_cache = ResultCache(max_model_sets, model_bytes)
        self.compute_counts: Counter = Counter()
        self._count_lock = threading.Lock()

    @property
    def nbytes(self) -> int:
        """Estimated memory of the cached results (0 when not bounded by bytes)."""
        return self._cache.nbytes + self._columns.nbytes + self._model_cache.nbytes

    # -- keys ------------------------------------------------------------
    @staticmethod
    def stage_fields(stage: str, settings: Settings) -> tuple[str, ...]:
        """The settings a stage's result depends on."""
        from .models.modelstage import MODEL_FIELDS
        sel = STAGE_FIELDS["cohort"]
        strata = STAGE_FIELDS["strata"]
        res = STAGE_FIELDS["residuals"] + (strata if settings.detrend_within_strata else ())
        table = {
            "ordered": tuple(f for f in sel if f not in ("min_visits", "require_covariate")),
            "selection": sel,
            "subject_fits": sel,
            "cohort": sel + strata,
            "subject_lines": sel + strata,
            "summaries": sel + strata + STAGE_FIELDS["summaries"],
            "residuals": sel + res,
            "variogram": sel + res + STAGE_FIELDS["variogram"],
            "lagcorr": sel + res + STAGE_FIELDS["lagcorr"],
            "models": sel + MODEL_FIELDS,   # the fit reads the centred x, never the strata
        }
        return table[stage]

    def _key(self, stage: str, dataset: Dataset, roles: Roles, settings: Settings, extra=()):
        d = settings.to_dict()
        sub = {k: d[k] for k in self.stage_fields(stage, settings)} if stage in (
            "ordered", "selection", "subject_fits", "cohort", "summaries", "residuals", "variogram",
            "lagcorr", "models", "subject_lines") else d
        return (dataset.key, roles, stage, json_key(sub, 16), extra)

    def _memo(self, stage, dataset, roles, settings, compute, extra=()):
        cache = self._model_cache if stage == "models" else self._cache
        value, fresh = cache.get_or_compute(
            self._key(stage, dataset, roles, settings, extra), compute)
        if fresh:
            with self._count_lock:
                self.compute_counts[stage] += 1
        return value

    # -- stages ----------------------------------------------------------
    def selection(self, dataset: Dataset, roles: Roles, settings: Settings) -> CohortSelection:
        keyed = settings.only(self.stage_fields("selection", settings))
        return self._memo("selection", dataset, roles, settings,
                          lambda: finish_selection(self.ordered_visits(dataset, roles, settings),
                                                   roles, keyed))

    def ordered_visits(self, dataset: Dataset, roles: Roles, settings: Settings) -> OrderedVisits:
        """The selection's work before the per-subject rules (see
        :func:`~analysis.preparation.prepare.order_visits`): a change of the fewest visits or of
        requiring the covariate starts from it. Treat as read-only."""
        keyed = settings.only(self.stage_fields("ordered", settings))
        return self._memo("ordered", dataset, roles, settings,
                          lambda: order_visits(dataset.frame, roles, keyed,
                                               columns=self.columns(dataset)))

    def derived(self, stage: str, name: str, dataset: Dataset, roles: Roles, settings: Settings,
                compute: Callable[[], Any]):
        """A result computed from ``stage``'s results (e.g. a view's table of every visit), kept
        under that stage's key plus ``name`` so that a change elsewhere (a highlight, another
        stage's setting) reuses it. Treat as read-only."""
        value, fresh = self._cache.get_or_compute(
            self._key(stage, dataset, roles, settings, (name,)), compute)
        if fresh:
            with self._count_lock:
                self.compute_counts[name] += 1
        return value

    def describe(self, dataset: Dataset) -> list[dict]:
        """:func:`~analysis.preparation.loading.describe_columns` of the table, kept under its
        key (the page shows it on every load). Treat as read-only."""
        from .preparation.loading import describe_columns

        return self._cache.get_or_compute((dataset.key, "describe"),
                                          lambda: describe_columns(dataset.frame))[0]

    def columns(self, dataset: Dataset) -> ColumnReader:
        """The dataset's role columns, each parsed once (subject codes, numbers, dates, column
        kinds) and kept in the exploratory cache under the data's key: a settings change never
        re-reads them."""
        def memo(key, compute):
            value, fresh = self._columns.get_or_compute((dataset.key, "columns", key), compute)
            if fresh:
                with self._count_lock:
                    self.compute_counts["columns"] += 1
            return value

        return ColumnReader(dataset.frame, memo)

    def cohort(self, dataset: Dataset, roles: Roles, settings: Settings) -> PreparedCohort:
        # the cached cohort carries exactly the settings of its key: a later request that
        # differs only in, say, detrending must not read this request's other choices
        keyed = settings.only(self.stage_fields("cohort", settings))

        def compute():
            selection = self.selection(dataset, roles, settings)
            check_group_limit(selection, keyed)
            return stratify(selection, keyed)

        return self._memo("cohort", dataset, roles, settings, compute)

    def subject_fits(self, dataset: Dataset, roles: Roles, settings: Settings):
        from .exploration.subject_fits import fit_subject_lines

        return self._memo("subject_fits", dataset, roles, settings,
                          lambda: fit_subject_lines(self.selection(dataset, roles, settings).panel))

    def subject_lines(self, dataset: Dataset, roles: Roles, settings: Settings) -> pd.DataFrame:
        """Per-subject OLS lines joined with stratum, stratum label and raw covariate (kept like
        a stage: several views read it; each caller gets its own shallow copy)."""
        def compute():
            cohort = self.cohort(dataset, roles, settings)
            fits = self.subject_fits(dataset, roles, settings)
            # the ids as the per-subject table holds them (no conversion of each id again)
            return join_subject_lines(fits.to_frame(cohort.baseline["subject"].array), cohort)

        return self._memo("subject_lines", dataset, roles, settings, compute).copy(deep=False)

    def residuals(self, dataset: Dataset, roles: Roles, settings: Settings):
        from .exploration.detrend import detrend

        def compute():
            if settings.detrend_within_strata:
                cohort = self.cohort(dataset, roles, settings)
                panel = cohort.panel
                groups = cohort.strata.codes[panel.codes]
            else:
                panel = self.selection(dataset, roles, settings).panel
                groups = None
            return detrend(panel, method=settings.detrend, spline_df=settings.spline_df,
                           lowess_frac=settings.lowess_frac, groups=groups)

        return self._memo("residuals", dataset, roles, settings, compute)

    def residual_panel(self, dataset: Dataset, roles: Roles, settings: Settings):
        panel = self.selection(dataset, roles, settings).panel
        return panel.with_y(self.residuals(dataset, roles, settings).residual)

    def variogram(self, dataset: Dataset, roles: Roles, settings: Settings):
        from .exploration.variogram import semivariogram

        return self._memo("variogram", dataset, roles, settings, lambda: semivariogram(
            self.residual_panel(dataset, roles, settings), n_bins=settings.variogram_bins,
            max_lag=settings.variogram_max_lag))

    def lag_correlation(self, dataset: Dataset, roles: Roles, settings: Settings):
        from .exploration.lagcorr import default_lag_width, lag_correlation

        def compute():
            panel = self.residual_panel(dataset, roles, settings)
            width = settings.lag_width or default_lag_width(panel.time)
            return lag_correlation(panel, width=width)

        return self._memo("lagcorr", dataset, roles, settings, compute)

    def summaries(self, dataset: Dataset, roles: Roles, settings: Settings) -> Summaries:
        from .exploration.summaries import cohort_dropout

        def compute():
            cohort = self.cohort(dataset, roles, settings)
            fits = self.subject_fits(dataset, roles, settings)
            slopes = np.asarray(fits.slope, dtype=float)
            # the smooth reads the selection's covariate and slopes, never the strata: kept
            # under the subject fits' key, so a change of how groups are cut reuses it
            smooth = self.derived("subject_fits", "slope smooth", dataset, roles, settings,
                                  lambda: slope_smooth(cohort, slopes))
            return build_summaries(cohort, slopes,
                                   lambda: cohort_dropout(cohort, data_cut=settings.data_cut),
                                   smooth=smooth)

        return self._memo("summaries", dataset, roles, settings, compute)

    def models(self, dataset: Dataset, roles: Roles, settings: Settings, choices=None):
        """Candidate mixed models fitted to the cohort (refitted only when the data, the
        cohort's settings or the :class:`~analysis.models.modelstage.ModelChoices` change)."""
        from .models import modelstage

        choices = choices if choices is not None else modelstage.ModelChoices()
        return self._memo("models", dataset, roles, settings,
                          lambda: modelstage.fit_models(self.cohort(dataset, roles, settings),
                                                        choices),
                          extra=(choices.key(),))

    def explore(self, dataset: Dataset, roles: Roles, settings: Settings) -> Exploration:
        """Every exploratory stage (each one cached on its own)."""
        return Exploration(
            settings=settings,
            cohort=self.cohort(dataset, roles, settings),
            subject_lines=self.subject_lines(dataset, roles, settings),
            residuals=self.residuals(dataset, roles, settings),
            variogram=self.variogram(dataset, roles, settings),
            lag_correlation=self.lag_correlation(dataset, roles, settings),
            summaries=self.summaries(dataset, roles, settings),
        )


def join_subject_lines(frame: pd.DataFrame, cohort: PreparedCohort) -> pd.DataFrame:
    """Per-subject OLS lines (``SubjectLines.to_frame``, panel code order) joined with stratum,
    stratum label, raw covariate and ``x``."""
    base = cohort.baseline
    frame["stratum"] = base["stratum"].to_numpy()
    frame["stratum_label"] = base["stratum_label"].array
    cov = cohort.covariate
    frame["covariate"] = (base[cov].to_numpy() if cov is not None
                          else np.full(len(frame), np.nan))
    if cohort.x is not None:
        frame["x"] = cohort.x
    return frame


def _raw_covariate(cohort: PreparedCohort) -> tuple[bool, np.ndarray]:
    """(the primary covariate is numeric, its untransformed value per subject or NaN)."""
    cov = cohort.covariate
    numeric = cov is not None and cohort.selection.covariate_kinds[cov] == "numeric"
    raw = (cohort.baseline[cov].to_numpy(float) if numeric
           else np.full(cohort.panel.n_subjects, np.nan))
    return numeric, raw


def slope_smooth(cohort: PreparedCohort, slopes: np.ndarray) -> pd.DataFrame:
    """The slope-against-covariate smooth of :func:`build_summaries` (empty for a categorical
    or absent covariate); reads only the selection's covariate and the slopes."""
    from .exploration.summaries import slope_covariate_smooth

    numeric, raw = _raw_covariate(cohort)
    return (slope_covariate_smooth(raw, slopes) if numeric
            else pd.DataFrame({"covariate": [], "slope_smooth": []}))


def build_summaries(cohort: PreparedCohort, slopes: np.ndarray, dropout: Callable,
                    smooth: pd.DataFrame | None = None) -> Summaries:
    """Stratum table and slope smooth from the per-subject slopes, and ``dropout()``
    (``smooth``: :func:`slope_smooth` already computed for this cohort's selection)."""
    from .exploration.summaries import stratum_table

    _, raw = _raw_covariate(cohort)
    table = stratum_table(cohort.panel, cohort.strata, raw, slopes)
    if smooth is None:
        smooth = slope_smooth(cohort, slopes)
    return Summaries(table, smooth, dropout())


def explore(df: pd.DataFrame, roles: Roles, settings: Settings) -> Exploration:
    """One-off exploratory analysis of a DataFrame (no cache kept)."""
    return Workbench(max_entries=32).explore(Dataset.from_frame(df), roles, settings)
