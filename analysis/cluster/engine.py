"""The client side of the cluster engine: one prepared cohort spread over Dask workers.

A :class:`ClusterCohort` reads a subject-hash partitioned Parquet dataset, checks that no
subject straddles partitions, prepares every partition on a worker (validation, time origin,
inclusion rules) and keeps the prepared partitions there (``client.map`` futures; Dask spills
them to disk when a worker runs short of memory). The client keeps only per-subject tables
(one row per subject: baseline values, visit counts, each subject's own line) and combines
the partitions' partial sums with the estimators' own finishing functions, so that every
number is the one the in-memory engine gives on the same rows:

===========================  =================================================================
quantity                     how it is combined
===========================  =================================================================
attrition table              step counts summed over partitions
strata cut points            per-subject baseline values on the client: exact quantiles
centring, per-subject lines  per subject (each subject lies in one partition)
mean trend (spline, line)    tall-skinny QR: each partition's R and Qᵀy, factorised again
semivariogram bins           bin sums; the smooth's seeded subsample of pairs is fetched by
                             pair position (the same pairs as in memory)
process variance             per-subject sums about the overall residual mean
lag correlation              window counts and sums, then cross products about the means
dropout: typical gap         exact median: min/max, a 4096-bucket histogram, then the values
                             in the bucket(s) holding it
dropout: profiles            visit counts and response sums per (cohort, time bin)
mixed-model likelihood       see :mod:`analysis.cluster.likelihood`
===========================  =================================================================

Not combinable: the lowess mean trend (``--detrend lowess``) is a smoother over every visit
and is refused with a message.
"""
from __future__ import annotations

import inspect
import os
from dataclasses import dataclass

import numpy as np
import pandas as pd

from analysis.cluster import tasks
from analysis.cluster.partitions import (check_subjects_disjoint, open_partitions,
                                         partition_subjects)
from analysis.exploration.detrend import spline_plan
from analysis.errors import DataError, SettingsError
from analysis.exploration.lagbins import equal_width_edges
from analysis.exploration.lagcorr import default_lag_width, finish_lag_correlation, lag_windows
from analysis.pipeline import (Exploration, build_summaries, check_group_limit,
                               join_subject_lines)
from analysis.preparation.prepare import Attrition, AttritionStep, CohortSelection, FollowupBasis, _sort_key
from analysis.preparation.prepare import stratify
from analysis.settings import STAGE_FIELDS, Roles, Settings
from analysis.exploration.summaries import (dropout_from_subjects, profile_cohorts, profile_frame)
from analysis.exploration.variogram import (add_variogram_sums, finish_semivariogram, semivariogram,
                                smooth_pick, variogram_max_lag)


# --------------------------------------------------------------------------- the cluster
def open_client(scheduler: str | None = None, **local):
    """A Dask client: to the scheduler at ``scheduler`` (e.g. ``tcp://10.0.0.5:8786``), or to a
    new ``LocalCluster`` sized to this machine (one single-threaded worker process per core;
    ``local`` overrides, e.g. ``n_workers=2, memory_limit="1GB"``)."""
    try:
        from distributed import Client, LocalCluster
    except ImportError:  # pragma: no cover - depends on the installation
        raise SettingsError("--engine dask needs the optional Dask extra: "
                            "pip install 'cohortlens[dask]'", field="engine") from None
    if scheduler:
        try:
            return Client(scheduler, timeout="20s")
        except (OSError, TimeoutError) as exc:
            raise SettingsError(f"--scheduler {scheduler}: no Dask scheduler answered "
                                f"({exc})", field="scheduler") from None
    opts = {"n_workers": os.cpu_count() or 1, "threads_per_worker": 1, "processes": True,
            "dashboard_address": None}
    opts.update(local)
    return Client(LocalCluster(**opts))


class SubjectCounts:
    """Stands in for a Panel on the client: visit counts per subject, no visit rows (those
    stay on the workers). Enough for the stratum table and the group checks."""

    def __init__(self, counts: np.ndarray):
        self.counts = np.asarray(counts, dtype=np.int64)
        self.starts = np.concatenate(([0], np.cumsum(self.counts)[:-1])).astype(np.int64)

    @property
    def n_subjects(self) -> int:
        return int(self.counts.size)

    @property
    def n_obs(self) -> int:
        return int(self.counts.sum())


@dataclass(frozen=True, eq=False)
class ResidualMethod:
    """What the exploration's ``residuals`` entry shows: the mean-trend description."""

    description: str
    fits: dict


def _semivariogram_default(name: str):
    return inspect.signature(semivariogram).parameters[name].default


class ClusterCohort:
    """A partitioned cohort prepared on a Dask cluster (see the module docstring).

    Parameters
    ----------
    client : distributed.Client
    source : str
        Folder, glob or fsspec address of the Parquet partitions.
    roles : Roles
    settings : Settings
        The cohort's selection settings are read here; the rest per call.
    """

    def __init__(self, client, source, roles: Roles, settings: Settings):
        self.client = client
        self.roles = roles
        self.files = open_partitions(source)
        subjects = client.gather(client.map(partition_subjects, self.files,
                                            subject=roles.subject, pure=False))
        check_subjects_disjoint(self.files, subjects)
        keyed = settings.only(STAGE_FIELDS["cohort"])
        self.selection_settings = keyed
        self.parts = client.map(tasks.load_part, self.files, roles=roles, settings=keyed,
                                pure=False)
        self._overview(client.gather(client.map(tasks.overview, self.parts, pure=False)))

    # -- per-subject tables on the client ---------------------------------------------------
    def _overview(self, views: list[dict]) -> None:
        names = max((v["steps"] for v in views), key=len)
        steps, prev = [], None
        for i, (name, _, _) in enumerate(names):
            sub = sum(v["steps"][i][1] for v in views if i < len(v["steps"]))
            obs = sum(v["steps"][i][2] for v in views if i < len(v["steps"]))
            steps.append(AttritionStep(name, sub, obs, 0 if prev is None else prev[0] - sub,
                                       0 if prev is None else prev[1] - obs))
            prev = (sub, obs)
            if i and obs == 0:
                raise DataError(f"no visits remain after the inclusion step '{name}'; "
                                "check the column roles and settings")
        full = [v for v in views if not v["empty"]]
        self.views = full
        labels = np.concatenate([v["labels"] for v in full])
        uniq = list(labels)
        if all(isinstance(v, str) for v in uniq):
            order = np.argsort(np.asarray(uniq, dtype=str), kind="stable")
        else:
            order = np.asarray(sorted(range(len(uniq)), key=lambda i: _sort_key(uniq[i])),
                               dtype=np.int64)
        self.order = order
        # where each global subject lives: partition (index into self.parts) and local code
        part_of = np.concatenate([np.full(len(v["labels"]), i, dtype=np.int64)
                                  for i, v in enumerate(full)])
        local = np.concatenate([np.arange(len(v["labels"]), dtype=np.int64) for v in full])
        self.part_of, self.local = part_of[order], local[order]
        self.full_index = [i for i, v in enumerate(views) if not v["empty"]]
        # global subject number of each partition's local subjects
        self.global_of = []
        inv = np.empty(order.size, dtype=np.int64)
        inv[order] = np.arange(order.size)
        off = 0
        for v in full:
            k = len(v["labels"])
            self.global_of.append(inv[off:off + k])
            off += k
        cat = (lambda key: np.concatenate([np.asarray(v[key]) for v in full])[order])
        baseline = pd.concat([v["baseline"] for v in full], ignore_index=True).iloc[order]
        baseline = baseline.reset_index(drop=True)
        self.lines = pd.concat([v["lines"] for v in full], ignore_index=True).iloc[order] \
            .reset_index(drop=True)
        self.counts = cat("counts")
        self.last_time, self.last_y = cat("last_time"), cat("last_y")
        first = full[0]
        kinds = dict(first["kinds"])
        for v in full[1:]:
            for c, k in v["kinds"].items():
                if k == "categorical":
                    kinds[c] = "categorical"
        warnings = tuple(dict.fromkeys(w for v in full for w in v["warnings"]))
        fu = None
        if first["followup"] is not None:
            f0 = first["followup"]
            ends = [v["followup"]["end"] for v in full]
            fu = FollowupBasis(
                kind=f0["kind"], origin=cat_follow(full, "origin")[order],
                end=None if ends[0] is None else cat_follow(full, "end")[order],
                latest=float(np.nanmax([v["followup"]["latest"] for v in full]))
                if f0["kind"] == "date" else np.nan,
                unit_days=f0["unit_days"], end_column=f0["end_column"])
        self.selection = CohortSelection(
            panel=SubjectCounts(self.counts), subject_ids=labels[order], baseline=baseline,
            covariate_kinds=kinds, covariate=first["covariate"], attrition=Attrition(
                tuple(steps)), warnings=warnings, roles=self.roles,
            settings=self.selection_settings, time_label=first["time_label"], followup=fu)
        self.tmin = min(v["tmin"] for v in full)
        self.tmax = max(v["tmax"] for v in full)
        self.longest = max(v["longest"] for v in full)
        self.total_pairs = sum(v["pairs"] for v in full)
        self.gap_n = sum(v["gap_n"] for v in full)
        self.gap_range = (float(np.nanmin([v["gap_min"] for v in full])),
                          float(np.nanmax([v["gap_max"] for v in full]))) if self.gap_n else None

    def _live(self):
        return [self.parts[i] for i in self.full_index]

    def per_part(self, values: np.ndarray) -> list[np.ndarray]:
        """A per-subject array (global order) cut into each partition's local order."""
        return [np.asarray(values)[g] for g in self.global_of]

    def subject_rows(self, label) -> pd.DataFrame:
        """The analysed visits of one subject (subject, time, response), fetched from the
        partition that holds it (what a subject card needs; nothing else leaves the workers)."""
        ids = self.selection.subject_ids
        where = np.flatnonzero(ids == label)
        if where.size == 0:
            raise DataError(f"subject {label!r} is not in the analysed cohort")
        part = self._live()[int(self.part_of[where[0]])]
        return self.client.submit(tasks.part_rows, part, [label], pure=False).result()

    # -- the exploration --------------------------------------------------------------------
    def cohort(self, settings: Settings):
        if settings.only(STAGE_FIELDS["cohort"]).to_dict() != self.selection_settings.to_dict():
            raise ValueError("these partitions were prepared with other selection settings "
                             "(origin, window, inclusion rules ...); open a new ClusterCohort")
        keyed = settings.only(STAGE_FIELDS["cohort"] + STAGE_FIELDS["strata"])
        check_group_limit(self.selection, keyed)
        return stratify(self.selection, keyed)

    def explore(self, settings: Settings) -> Exploration:
        """Every exploratory result, equal to ``analysis.pipeline.explore`` on the same rows."""
        cohort = self.cohort(settings)
        if settings.detrend == "lowess":
            raise SettingsError(
                "detrend == 'lowess' cannot be combined from partitions (a lowess curve is a "
                "smoother over every visit at once); with --engine dask choose spline, linear "
                "or none", field="detrend")
        groups = (self.per_part(cohort.strata.codes) if settings.detrend_within_strata
                  else [None] * len(self.global_of))
        fits, description = self._mean_trend(settings, groups)

        # windows, lags, bins: from the ranges the overview collected
        width = settings.lag_width or default_lag_width(np.array([self.tmin, self.tmax]))
        start, n_win = lag_windows(self.tmin, self.tmax, width)
        lag = (start, float(width), n_win)
        prof_cohorts = profile_cohorts(self.last_time)
        n_bins_prof = inspect.signature(dropout_from_subjects).parameters["n_time_bins"].default
        edges = equal_width_edges(self.tmin, self.tmax, n_bins_prof)
        k_prof = len(prof_cohorts.labels)
        firsts = self._first(fits, groups, lag, prof_cohorts, edges, k_prof)
        big_n = float(sum(f["n"] for f in firsts))
        centre = sum(f["r_sum"] for f in firsts) / big_n
        subjects = sum(f["win_subjects"] for f in firsts)
        with np.errstate(invalid="ignore", divide="ignore"):
            col_mean = sum(f["win_sum"] for f in firsts) / subjects
        prof_n = sum(f["profiles"][0] for f in firsts)
        prof_total = sum(f["profiles"][1] for f in firsts)
        gap_buckets = None
        if self.gap_range is not None:
            hist = sum(f["gap_hist"] for f in firsts)
            gap_buckets, gap_ranks = _median_buckets(hist, self.gap_n)

        n_bins = settings.variogram_bins
        max_lag = variogram_max_lag(self.total_pairs, self.longest, settings.variogram_max_lag)
        seed = _semivariogram_default("seed")
        pick = smooth_pick(self.total_pairs, _semivariogram_default("smooth_max_pairs"), seed)
        picks, back = self._pair_picks(pick)
        seconds = [self.client.submit(
            tasks.second_pass, part, fits, groups[i],
            variogram={"n_bins": n_bins, "max_lag": max_lag, "pick": picks[i]}, lag=lag,
            col_mean=col_mean, centre=centre, big_n=big_n, gap_range=self.gap_range,
            gap_buckets=gap_buckets, pure=False) for i, part in enumerate(self._live())]
        seconds = self.client.gather(seconds)

        variogram = self.combine_variogram(
            [s["variogram"] for s in seconds], back, n_bins=n_bins, max_lag=max_lag,
            total_pairs=self.total_pairs, pick=pick, seed=seed,
            pv_sums=[s["pv_sum"] for s in seconds], counts=self.counts, big_n=big_n)
        cross = tuple(sum(s["cross"][j] for s in seconds) for j in range(4))
        lagcorr = finish_lag_correlation(subjects, col_mean, cross, start=start, width=width)

        gap = float("nan")
        if self.gap_range is not None:
            vals = [s["gap_values"] for s in seconds]
            gap = _median_from_values(vals, gap_ranks, hist, gap_buckets)

        slopes = np.asarray(self.lines["slope"], dtype=float)
        lines = join_subject_lines(self.lines.copy(), cohort)

        def dropout():
            basis = cohort.selection.followup
            pot, source, notes = (basis.potential(data_cut=settings.data_cut,
                                                  time_max=cohort.settings.time_max)
                                  if basis is not None else (None, "", ()))
            return dropout_from_subjects(
                self.last_time, self.last_y, cohort.strata, t_max=self.tmax, typical_gap=gap,
                profiles=lambda last_time, nb: profile_frame(prof_cohorts, edges, prof_n,
                                                             prof_total),
                subject_ids=cohort.subject_ids, potential_followup=pot,
                followup_source=source, notes=notes, time_unit=cohort.settings.unit)

        summaries = build_summaries(cohort, slopes, dropout)
        return Exploration(settings=settings, cohort=cohort, subject_lines=lines,
                           residuals=ResidualMethod(description, fits), variogram=variogram,
                           lag_correlation=lagcorr, summaries=summaries)

    def _first(self, fits, groups, lag, prof_cohorts, edges, k_prof):
        codes = self.per_part(prof_cohorts.codes)
        futures = [self.client.submit(tasks.first_pass, part, fits, groups[i], lag=lag,
                                      profiles=(codes[i], edges, k_prof),
                                      gap_range=self.gap_range, pure=False)
                   for i, part in enumerate(self._live())]
        return self.client.gather(futures)

    # -- mean trend ---------------------------------------------------------------------------
    def _mean_trend(self, settings: Settings, groups) -> tuple[dict, str]:
        """Fitted mean trends (pooled, and per group when detrending within strata) and the
        description, as :func:`analysis.exploration.detrend.detrend` words them."""
        tallies = self._map_groups(tasks.trend_tallies, groups)
        keys = sorted({k for t in tallies for k in t})
        plans, fits, texts = {}, {}, {}
        for key in keys:
            parts = [t[key] for t in tallies if key in t]
            distinct = np.unique(np.concatenate([p[0] for p in parts]))
            n_obs = sum(p[1] for p in parts)
            y_sum = sum(p[2] for p in parts)
            method = settings.detrend
            if method == "none" or distinct.size == 1:
                fits[key] = tasks.TrendFit(mean=y_sum / n_obs)
                texts[key] = "grand mean"
            elif method == "linear" or (method == "spline" and settings.spline_df == 1):
                plans[key] = np.array([distinct[0], distinct[-1]])
                texts[key] = "straight line in time (pooled least squares)"
            else:
                plans[key], texts[key] = spline_plan(distinct, int(settings.spline_df), [])
        if plans:
            factors = self._map_groups(tasks.trend_factors, groups, knots_of=plans)
            for key, knots in plans.items():
                rs = [f[key] for f in factors if key in f]
                r_all = np.vstack([r for r, _ in rs])
                qty_all = np.concatenate([q for _, q in rs])
                q2, r2 = np.linalg.qr(r_all)
                beta = np.linalg.lstsq(r2, q2.T @ qty_all, rcond=None)[0]
                fits[key] = tasks.TrendFit(knots=knots, beta=beta)
        n_groups = len(keys) - 1
        description = f"Mean trend removed: {texts[-1]}"
        if n_groups:
            description += f", fitted separately within each of {n_groups} groups"
        return fits, description + "."

    def _map_groups(self, fn, groups, **common):
        futures = [self.client.submit(fn, part, groups[i], pure=False, **common)
                   for i, part in enumerate(self._live())]
        return self.client.gather(futures)

    # -- pair positions -------------------------------------------------------------------------
    def _pair_picks(self, pick, keep=None):
        """Per partition: its local positions of the globally picked pairs (None = all), and
        a function mapping its local positions back to global pair positions (pair order of
        :func:`analysis.exploration.pairs.iter_pair_chunks`: visit count, then subject, then triu). With
        ``keep`` (per subject), over the kept subjects only."""
        counts, global_of = self.counts, self.global_of
        if keep is not None:
            renumber = np.cumsum(keep) - 1
            counts = counts[keep]
            global_of = [renumber[gl[keep[gl]]] for gl in global_of]
        part_of = np.empty(counts.size, dtype=np.int64)
        local = np.empty(counts.size, dtype=np.int64)
        for i, gl in enumerate(global_of):
            part_of[gl], local[gl] = i, np.arange(gl.size)
        g_off = _pair_offsets(counts)
        picks, back = [], []
        if pick is not None:
            order = np.argsort(counts, kind="stable")
            npairs = (counts * (counts - 1) // 2)[order]
            ends = np.cumsum(npairs)
            idx = np.searchsorted(ends, pick, side="right")
            subj = order[idx]
            within = pick - (ends[idx] - npairs[idx])
        for i, gl in enumerate(global_of):
            l_off = _pair_offsets(counts[gl])
            if pick is None:
                picks.append(None)
            else:
                mine = part_of[subj] == i
                picks.append(np.sort(l_off[local[subj[mine]]] + within[mine]))
            back.append(_local_to_global(counts[gl], l_off, g_off[gl]))
        return picks, back

    def combine_variogram(self, sums, back, *, n_bins, max_lag, total_pairs, pick, seed,
                          pv_sums, counts, big_n):
        """The semivariogram from the partitions' bin sums (smooth pairs put back in global
        pair order) and process-variance sums."""
        vsums = add_variogram_sums(sums, n_bins=n_bins, max_lag=max_lag)
        gpos = np.concatenate([back[i](s.smooth_pos) for i, s in enumerate(sums)])
        order = np.argsort(gpos, kind="stable")
        vsums.smooth_u, vsums.smooth_v = vsums.smooth_u[order], vsums.smooth_v[order]
        n = np.asarray(counts, dtype=float)
        n_between = (big_n ** 2 - float(np.sum(n ** 2))) / 2.0
        pv = 0.5 * sum(pv_sums) / n_between if n_between > 0 else float("nan")
        return finish_semivariogram(
            vsums, n_bins=n_bins, max_lag=max_lag, total_pairs=total_pairs,
            subsampled=pick is not None, seed=seed,
            smooth_frac=_semivariogram_default("smooth_frac"), pv=pv)


def cat_follow(views, key):
    return np.concatenate([np.asarray(v["followup"][key], dtype=float) for v in views])


def _pair_offsets(counts: np.ndarray) -> np.ndarray:
    """Position of each subject's first pair in pair order (by visit count, then subject)."""
    counts = np.asarray(counts, dtype=np.int64)
    order = np.argsort(counts, kind="stable")
    npairs = (counts * (counts - 1) // 2)[order]
    off = np.empty(counts.size, dtype=np.int64)
    off[order] = np.cumsum(npairs) - npairs
    return off


def _local_to_global(counts, l_off, g_off):
    counts = np.asarray(counts, dtype=np.int64)
    order = np.argsort(counts, kind="stable")
    npairs = (counts * (counts - 1) // 2)[order]
    ends = np.cumsum(npairs)

    def back(pos):
        pos = np.asarray(pos, dtype=np.int64)
        idx = np.searchsorted(ends, pos, side="right")
        subj = order[idx]
        return g_off[subj] + (pos - l_off[subj])
    return back


def _median_buckets(hist: np.ndarray, n: int):
    """Buckets holding the middle order statistic(s) of ``n`` values, and their ranks."""
    ranks = (n // 2,) if n % 2 else (n // 2 - 1, n // 2)
    cum = np.cumsum(hist)
    buckets = np.unique([int(np.searchsorted(cum, r, side="right")) for r in ranks])
    return buckets, ranks


def _median_from_values(vals, ranks, hist, buckets) -> float:
    """np.median of all values, from the distinct values (with counts) in the median buckets."""
    v = np.concatenate([x for x, _ in vals])
    c = np.concatenate([k for _, k in vals])
    uniq, inv = np.unique(v, return_inverse=True)
    cnt = np.bincount(inv, weights=c).astype(np.int64)
    below = int(hist[:buckets[0]].sum())           # values in lower buckets
    cum = np.cumsum(cnt) + below
    picked = [uniq[int(np.searchsorted(cum, r, side="right"))] for r in ranks]
    return float(picked[0]) if len(picked) == 1 else float(np.mean(picked))
