"""The page's stages on a Dask-backed cohort (``cohortlens serve DIR --engine dask``).

A :class:`ClusterWorkbench` answers the page's stage calls (``selection``, ``cohort``,
``subject_lines``, ``variogram``, ``lag_correlation``, ``summaries``, ``models``, ...) with the
same result objects the in-memory :class:`~analysis.pipeline.Workbench` gives, computed by
:class:`~analysis.cluster.engine.ClusterCohort`: only aggregated results and the per-subject
tables (one row per subject: each subject's line, baseline values, visit counts) reach the
page's process; the visits stay on the workers.

* One :class:`ClusterCohort` per (roles, selection settings), kept for the last few: a change
  of origin, window or inclusion rule prepares the partitions again on the workers; a change
  of groups, detrending, bins or windows reuses them.
* The exploratory results come from one :meth:`ClusterCohort.explore` per combination of the
  settings they read (bins, lag window, detrending, groups, data cut): a change of any of them
  runs the two passes over the partitions again (the in-memory Workbench re-bins only).
* The courses over time: the drawn subjects' visits are fetched from their partitions and the
  group means summed per (group, time bin) on the workers (:func:`cluster_group_means`).
* A result that reads every visit at once (the model checks, the next-study plan, a view's
  table of every visit) raises :class:`~analysis.errors.NotOnCluster`, which
  the page shows in that view; a subject card fetches its subject's visits on demand
  (:meth:`subject_visits`).
* Any other table (an upload on the page) is analysed in memory by the ordinary Workbench.
"""
from __future__ import annotations

import hashlib
import threading
from collections import Counter
from dataclasses import dataclass, replace

import numpy as np
import pandas as pd

from analysis.cluster.engine import ClusterCohort, SubjectCounts
from analysis.cluster.partitions import open_partitions, read_partition
from analysis.errors import DataError, NotOnCluster, clip
from analysis.pipeline import Exploration, ResultCache, Workbench, join_subject_lines
from analysis.preparation.loading import Dataset
from analysis.settings import Roles, Settings, json_key

#: rows of the first partition the page shows as the table's preview and describes its
#: columns from (the column kinds of a partitioned dataset are the same in every file)
SAMPLE_ROWS = 500

#: prepared cohorts kept on the workers at once (each holds every analysed visit)
KEEP_COHORTS = 2

VISITS_NOTE = ("{what} reads every visit at once; with --engine dask the visits stay on the "
               "Dask workers and only aggregated results reach this page, so it is not computed "
               "on the cluster yet. The other views show the whole cohort; click a subject to "
               "see its visits.")


class VisitsOnWorkers(SubjectCounts):
    """The page's stand-in for a Panel: visit counts and last visit times per subject; asking
    for the visits themselves (times, responses, codes ...) says that they stay on the
    workers."""

    def __init__(self, counts: np.ndarray, last_times: np.ndarray):
        super().__init__(counts)
        self.last_times = np.asarray(last_times, dtype=float)

    def __getattr__(self, name):
        if name.startswith("_"):
            raise AttributeError(name)
        raise NotOnCluster(VISITS_NOTE.format(what="This view"))


@dataclass(frozen=True, eq=False)
class ClusterDataset(Dataset):
    """A partitioned Parquet dataset as the page knows it: ``frame`` is a sample of the first
    partition (column list, kinds and preview); the counts are of the whole dataset."""

    source: str = ""
    n_rows: int = 0
    n_subjects: int = 0


def _file_counts(path: str, subject: str) -> tuple[int, np.ndarray]:
    """(rows, distinct subject texts) of one partition (reads the subject column only)."""
    from analysis.cluster.partitions import subject_text

    frame = read_partition(path, columns=[subject])
    return len(frame), np.unique(subject_text(frame[subject]))


def _file_rows(path: str) -> int:
    """Rows of one partition: from the Parquet footer when the file opens directly."""
    try:
        import pyarrow.parquet as pq

        return int(pq.ParquetFile(path).metadata.num_rows)
    except Exception:  # noqa: BLE001 - an fsspec address: read it (read_partition says why not)
        return len(read_partition(path))


def cluster_dataset(client, source, subject: str | None) -> ClusterDataset:
    """The page's view of a partitioned dataset: a sample of rows, the row count (and the
    subject count when the subject column is known), under a key made of the files' names."""
    files = open_partitions(source)
    sample = read_partition(files[0]).head(SAMPLE_ROWS).reset_index(drop=True)
    n_rows, n_subjects = 0, 0
    if subject and subject in sample.columns:
        got = client.gather(client.map(_file_counts, files, subject=subject, pure=False))
        n_rows = sum(r for r, _ in got)
        n_subjects = sum(len(s) for _, s in got)    # partitions hold disjoint subjects
    else:
        got = client.gather(client.map(_file_rows, files, pure=False))
        n_rows = sum(got)
    key = "dask-" + hashlib.sha1(repr(files).encode()).hexdigest()[:15]
    return ClusterDataset(key=key, frame=sample, name=str(source), source=str(source),
                          n_rows=int(n_rows), n_subjects=int(n_subjects))


class ClusterWorkbench:
    """The page's Workbench for one partitioned dataset on a Dask client (see the module
    docstring); ``memory`` analyses every other table (uploads) in this process.
    ``max_bytes`` bounds the cluster's cached results on the client (per-subject tables and
    aggregates; estimated as the Workbench does), None: the entry counts only."""

    def __init__(self, client, dataset: ClusterDataset, memory: Workbench,
                 keep_cohorts: int = KEEP_COHORTS, max_bytes: int | None = None):
        self.client = client
        self.dataset = dataset
        self.memory = memory
        self._cohorts = ResultCache(max_entries=keep_cohorts)
        self._results = ResultCache(max_entries=64, max_bytes=max_bytes)
        self._models = ResultCache(max_entries=4)
        self.compute_counts: Counter = Counter()
        self._count_lock = threading.Lock()

    # -- which engine ---------------------------------------------------------------------------
    def on_cluster(self, dataset: Dataset) -> bool:
        return dataset is not None and dataset.key == self.dataset.key

    def __getattr__(self, name):
        # anything the page asks that is not a stage below (e.g. nbytes): the in-memory bench
        if name.startswith("_") or name == "memory":
            raise AttributeError(name)
        return getattr(self.memory, name)

    stage_fields = staticmethod(Workbench.stage_fields)

    def _memo(self, cache, key, stage, compute):
        value, fresh = cache.get_or_compute(key, compute)
        if fresh:
            with self._count_lock:
                self.compute_counts[stage] += 1
        return value

    def _key(self, stage, roles, settings, extra=()):
        d = settings.to_dict()
        return (roles, stage, json_key({k: d[k] for k in self.stage_fields(stage, settings)}, 16),
                extra)

    def prepared(self, roles: Roles, settings: Settings) -> ClusterCohort:
        """The partitions prepared on the workers for these roles and selection settings."""
        def compute():
            cc = ClusterCohort(self.client, self.dataset.source, roles, settings)
            # the page's cohort: visit counts only, and a clear note for anything per visit
            cc.selection = replace(cc.selection, panel=VisitsOnWorkers(cc.counts, cc.last_time))
            return cc

        return self._memo(self._cohorts, self._key("selection", roles, settings), "prepare",
                          compute)

    # -- the stages -----------------------------------------------------------------------------
    def describe(self, dataset: Dataset) -> list[dict]:
        return self.memory.describe(dataset)        # the sample's columns, once

    def selection(self, dataset, roles, settings):
        if not self.on_cluster(dataset):
            return self.memory.selection(dataset, roles, settings)
        return self.prepared(roles, settings).selection

    def cohort(self, dataset, roles, settings):
        if not self.on_cluster(dataset):
            return self.memory.cohort(dataset, roles, settings)
        cc = self.prepared(roles, settings)
        return self._memo(self._results, self._key("cohort", roles, settings), "cohort",
                          lambda: cc.cohort(settings))

    def subject_lines(self, dataset, roles, settings) -> pd.DataFrame:
        if not self.on_cluster(dataset):
            return self.memory.subject_lines(dataset, roles, settings)
        cc = self.prepared(roles, settings)
        cohort = self.cohort(dataset, roles, settings)
        return self._memo(self._results, self._key("subject_lines", roles, settings),
                          "subject_lines",
                          lambda: join_subject_lines(cc.lines.copy(), cohort)).copy(deep=False)

    def _explored(self, roles, settings, stage: str) -> Exploration:
        """One exploration on the cluster, kept under the settings ``stage`` reads. The
        summaries read no detrending: asked with a lowess trend (which the cluster does not
        combine), they are computed with none."""
        if stage == "summaries" and settings.detrend == "lowess":
            settings = Settings.from_dict({**settings.to_dict(), "detrend": "none"})
        cc = self.prepared(roles, settings)
        return self._memo(self._results, self._key(stage, roles, settings, ("explore",)),
                          "explore", lambda: cc.explore(settings))

    def _explored_part(self, name: str, stage: str, dataset, roles, settings):
        """The exploration's ``name`` result (its ``stage``'s cache key) on the cluster, or the
        in-memory workbench's for a dataset held here (an upload)."""
        if not self.on_cluster(dataset):
            return getattr(self.memory, name)(dataset, roles, settings)
        return getattr(self._explored(roles, settings, stage), name)

    def residuals(self, dataset, roles, settings):
        return self._explored_part("residuals", "residuals", dataset, roles, settings)

    def variogram(self, dataset, roles, settings):
        return self._explored_part("variogram", "variogram", dataset, roles, settings)

    def lag_correlation(self, dataset, roles, settings):
        return self._explored_part("lag_correlation", "lagcorr", dataset, roles, settings)

    def summaries(self, dataset, roles, settings):
        return self._explored_part("summaries", "summaries", dataset, roles, settings)

    def models(self, dataset, roles, settings, choices=None):
        from analysis.cluster.models import fit_cluster_models
        from analysis.models.modelstage import ModelChoices

        if not self.on_cluster(dataset):
            return self.memory.models(dataset, roles, settings, choices)
        choices = choices if choices is not None else ModelChoices()
        cc = self.prepared(roles, settings)
        return self._memo(self._models, self._key("models", roles, settings, (choices.key(),)),
                          "models",
                          lambda: fit_cluster_models(cc, cc.cohort(settings), choices))

    def explore(self, dataset, roles, settings) -> Exploration:
        if not self.on_cluster(dataset):
            return self.memory.explore(dataset, roles, settings)
        return Exploration(
            settings=settings, cohort=self.cohort(dataset, roles, settings),
            subject_lines=self.subject_lines(dataset, roles, settings),
            residuals=self.residuals(dataset, roles, settings),
            variogram=self.variogram(dataset, roles, settings),
            lag_correlation=self.lag_correlation(dataset, roles, settings),
            summaries=self.summaries(dataset, roles, settings))

    # -- what reads every visit -------------------------------------------------------------------
    def refuse_visit_view(self, dataset, what: str) -> None:
        """Raise :class:`NotOnCluster` naming ``what`` when ``dataset`` is on the cluster."""
        if self.on_cluster(dataset):
            raise NotOnCluster(VISITS_NOTE.format(what=what))

    def subject_fits(self, dataset, roles, settings):
        self.refuse_visit_view(dataset, "This result")
        return self.memory.subject_fits(dataset, roles, settings)

    def residual_panel(self, dataset, roles, settings):
        self.refuse_visit_view(dataset, "This view")
        return self.memory.residual_panel(dataset, roles, settings)

    def columns(self, dataset):
        self.refuse_visit_view(dataset, "This view")
        return self.memory.columns(dataset)

    def derived(self, stage, name, dataset, roles, settings, compute):
        if not self.on_cluster(dataset):
            return self.memory.derived(stage, name, dataset, roles, settings, compute)
        return self._memo(self._results, self._key(stage, roles, settings, (name,)), name,
                          compute)

    def subject_visits(self, dataset, roles, settings, subject) -> pd.DataFrame:
        """One subject's analysed visits (time, response), fetched from the partition that
        holds it; ``subject`` may be the id's text (as the page's stores keep it)."""
        if not self.on_cluster(dataset):
            raise ValueError("subject_visits is for the cluster's own dataset")
        cc = self.prepared(roles, settings)
        ids = np.asarray(cc.selection.subject_ids)
        hit = np.flatnonzero(ids.astype(str) == str(subject))
        if hit.size == 0:
            raise DataError(f"subject {clip(subject)} is not in the analysed cohort")
        rows = cc.subject_rows(ids[hit[0]])
        return rows[["time", "response"]].reset_index(drop=True)


# --------------------------------------------------------------------------- courses over time
def _course_sums(part, subject_codes, edges, size):
    """Per (group, time bin) of one partition: visits, time sum and response sum (the sums
    :func:`analysis.exploration.summaries.group_means` makes over every visit)."""
    from analysis.exploration.lagbins import edge_bin

    if part.selection is None:
        return np.zeros(size), np.zeros(size), np.zeros(size)
    p = part.panel
    t, y = np.asarray(p.time, dtype=float), np.asarray(p.y, dtype=float)
    code = np.asarray(subject_codes, dtype=np.int64)[p.codes]
    ok = np.isfinite(t) & np.isfinite(y) & (code >= 0)
    nb = edges.size - 1
    key = code[ok] * nb + edge_bin(t[ok], edges)
    return (np.bincount(key, minlength=size).astype(float),
            np.bincount(key, weights=t[ok], minlength=size),
            np.bincount(key, weights=y[ok], minlength=size))


def cluster_group_means(wb: ClusterWorkbench, roles, settings, strata, *, n_bins=None,
                        min_visits=None) -> pd.DataFrame:
    """:func:`~analysis.exploration.summaries.group_means` of every analysed visit, from the
    partitions' sums per (group, time bin) over the cohort's time range."""
    from analysis.exploration.lagbins import equal_width_edges
    from analysis.exploration.summaries import MEAN_BINS, MEAN_MIN_VISITS, means_table
    from analysis.preparation.strata import MISSING_LABEL

    n_bins = MEAN_BINS if n_bins is None else n_bins
    min_visits = MEAN_MIN_VISITS if min_visits is None else min_visits
    cc = wb.prepared(roles, settings)
    cohort = cc.cohort(settings)
    labels = np.asarray(tuple(cohort.strata.labels) + (MISSING_LABEL,), dtype=object)
    own = labels[np.asarray(cohort.strata.codes)].astype(str)
    codes = pd.Categorical(own, categories=list(strata)).codes.astype(np.int64)
    edges = equal_width_edges(cc.tmin, cc.tmax, n_bins)
    nb = edges.size - 1
    size = len(strata) * nb
    sums = wb.client.gather([wb.client.submit(_course_sums, part, c, edges, size, pure=False)
                             for part, c in zip(cc._live(), cc.per_part(codes))])
    return means_table(strata, nb, sum(s[0] for s in sums).astype(np.int64),
                       sum(s[1] for s in sums), sum(s[2] for s in sums), min_visits=min_visits)


def cluster_visits_of(wb: ClusterWorkbench, roles, settings, chosen) -> pd.DataFrame:
    """Every analysed visit of the ``chosen`` subjects (ids as text), fetched from the
    partitions holding them: subject (text), time, response, stratum, stratum_label, in
    subject order then time (the rows ``cohort.frame`` has for them)."""
    from analysis.cluster import tasks
    from analysis.preparation.strata import MISSING_LABEL

    cc = wb.prepared(roles, settings)
    cohort = cc.cohort(settings)
    ids = np.asarray(cc.selection.subject_ids)
    index = pd.Index(ids.astype(str))
    code = index.get_indexer(np.asarray(chosen, dtype=str))
    code = np.sort(code[code >= 0])
    live = cc._live()
    where = cc.part_of[code]
    futures = [wb.client.submit(tasks.part_rows, live[int(i)], list(ids[code[where == i]]),
                                pure=False) for i in np.unique(where)]
    cols = ["subject", "time", "response", "stratum", "stratum_label"]
    if not futures:
        return pd.DataFrame(columns=cols)
    rows = pd.concat(wb.client.gather(futures), ignore_index=True)
    rows["subject"] = rows["subject"].astype(str)
    own = index.get_indexer(rows["subject"].to_numpy())
    rows = rows.iloc[np.argsort(own, kind="stable")].reset_index(drop=True)
    strata = np.asarray(cohort.strata.codes)[np.sort(own)]
    labels = np.asarray(tuple(cohort.strata.labels) + (MISSING_LABEL,), dtype=object)
    rows["stratum"] = strata
    rows["stratum_label"] = labels[strata]
    return rows[cols]
