"""Exploratory recompute: vectorised path against a straightforward per-subject reference.

Run:  python benchmarks/bench_eda.py            (20,000 subjects, then 100,000)
      python benchmarks/bench_eda.py --quick    (2,000 subjects, then 10,000)

Prints wall times and ratios measured in this run (target: fast path >= 50x the
reference), the pair-enumeration step on its own, and time and peak memory of the
fast path on the large cohort. Nothing here asserts a time.

The fast path is ``analysis.pipeline.explore`` (validation and cohort selection,
per-subject OLS lines, detrended residuals, semivariogram, lag correlation, strata
and their summaries).

The reference does the same jobs the obvious way: pandas ``groupby().apply`` with
``np.polyfit`` per subject for the lines, a global straight-line detrend, a
Python loop over subjects enumerating pairs with ``itertools.combinations`` for
the semivariogram, and a pandas pivot + ``DataFrame.corr`` for the lag correlation.
"""
from __future__ import annotations

import argparse
import gc
import itertools
import math
import resource
import sys
import time
import tracemalloc
import warnings

import numpy as np
import pandas as pd

from analysis.exploration.lagcorr import default_lag_width
from analysis.exploration.pairs import within_pair_rows
from analysis.pipeline import explore
from analysis.preparation.panel import Panel
from analysis.settings import Roles, Settings
from analysis.exploration.variogram import semivariogram

ROLES = Roles(subject="subject", time="months", response="egfr", covariates=("donor_age",))
SETTINGS = Settings(min_visits=1, n_strata=4, detrend="linear")


def simulate(n_subjects: int, seed: int = 0) -> pd.DataFrame:
    """Invented cohort: 1-12 visits per subject at irregular times over 0-60 months."""
    rng = np.random.default_rng(seed)
    visits = rng.integers(1, 13, n_subjects)
    subj = np.repeat(np.arange(n_subjects), visits)
    months = rng.uniform(0, 60, subj.size)          # continuous: no repeated (subject, time)
    age = rng.normal(45, 12, n_subjects).round(0)
    slope = -0.05 - 0.004 * (age - 45) + rng.normal(0, 0.05, n_subjects)
    level = 55 + rng.normal(0, 9, n_subjects)
    egfr = level[subj] + slope[subj] * months + rng.normal(0, 4, subj.size)
    return pd.DataFrame({"subject": [f"S{i:06d}" for i in subj], "months": months,
                         "egfr": egfr.round(2), "donor_age": age[subj]})


# -- fast path ------------------------------------------------------------------
def fast_path(df: pd.DataFrame):
    """The full exploratory recompute the dashboard and CLI run (``analysis.pipeline.explore``)."""
    return explore(df, ROLES, SETTINGS), "analysis.pipeline.explore"


# -- reference ------------------------------------------------------------------
def reference(df: pd.DataFrame, n_bins: int = 10):
    def ols(g):
        if len(g) < 2:
            return pd.Series({"intercept": g["egfr"].iloc[0], "slope": np.nan})
        b = np.polyfit(g["months"].to_numpy(), g["egfr"].to_numpy(), 1)
        return pd.Series({"intercept": b[1], "slope": b[0]})

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")         # near-tied visit times: poorly conditioned fits
        lines = df.groupby("subject").apply(ols, include_groups=False)
    beta = np.polyfit(df["months"], df["egfr"], 1)
    work = df.assign(resid=df["egfr"] - np.polyval(beta, df["months"]))
    vg = reference_variogram(work, n_bins=n_bins)
    w = default_lag_width(work["months"].to_numpy())
    work["window"] = np.floor(work["months"] / w).astype(int)
    wide = work.pivot_table(index="subject", columns="window", values="resid", aggfunc="mean")
    corr = wide.corr(min_periods=3)
    return lines, vg, corr


def reference_pairs(work: pd.DataFrame):
    lags, halfsq = [], []
    for _, g in work.groupby("subject", sort=False):
        t = g["months"].tolist()
        r = g["resid"].tolist()
        for j, k in itertools.combinations(range(len(t)), 2):
            lags.append(abs(t[j] - t[k]))
            halfsq.append(0.5 * (r[j] - r[k]) ** 2)
    return lags, halfsq


def reference_variogram(work: pd.DataFrame, n_bins: int):
    lags, halfsq = reference_pairs(work)
    max_lag = max(lags)
    width = max_lag / n_bins
    sums = [0.0] * n_bins
    cnt = [0] * n_bins
    for u, v in zip(lags, halfsq):
        k = min(int(u / width), n_bins - 1)
        sums[k] += v
        cnt[k] += 1
    return [s / c if c else math.nan for s, c in zip(sums, cnt)]


# -- timing helpers -------------------------------------------------------------
def timed(fn, *args, repeat: int = 1):
    best = math.inf
    out = None
    for _ in range(repeat):
        gc.collect()
        t0 = time.perf_counter()
        out = fn(*args)
        best = min(best, time.perf_counter() - t0)
    return best, out


def fast_pairs(panel: Panel):
    a, b = within_pair_rows(panel.starts, panel.counts)
    return np.abs(panel.time[b] - panel.time[a]), 0.5 * (panel.y[b] - panel.y[a]) ** 2


def large_run(n_big: int) -> None:
    big = simulate(n_big, seed=2)
    print(f"\nlarge cohort: {n_big:,} subjects, {len(big):,} rows")
    t_big, (_, path) = timed(fast_path, big)
    print(f"fast path [{path}]: {t_big:.2f} s")
    tracemalloc.start()
    fast_path(big)
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    rss = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    print(f"peak memory allocated during the recompute (tracemalloc): {peak / 2**20:.0f} MiB; "
          f"process max RSS so far {rss / 1024:.0f} MiB")


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="smaller cohorts (CI smoke run)")
    args = ap.parse_args(argv)
    # large runs: 100,000 subjects (about 650,000 rows with 1-12 visits), then about 1M rows
    n_ref, n_bigs = (2_000, (10_000,)) if args.quick else (20_000, (100_000, 154_000))

    df = simulate(n_ref, seed=1)
    print(f"cohort: {n_ref:,} subjects, {len(df):,} rows")
    t_fast, (_, path) = timed(fast_path, df, repeat=3)
    print(f"fast path [{path}]: {t_fast:.3f} s (best of 3)")
    t_ref, (_, ref_vg, _) = timed(reference, df)
    print(f"reference (groupby/apply OLS + itertools pair loop + pandas corr): {t_ref:.3f} s")
    print(f"ratio reference / fast: {t_ref / t_fast:.1f}x  (target >= 50x)")

    # the pair step alone, on the same residuals
    beta = np.polyfit(df["months"], df["egfr"], 1)
    work = df.assign(resid=df["egfr"] - np.polyval(beta, df["months"]))
    panel = Panel.from_arrays(work["subject"].to_numpy(), work["months"].to_numpy(float),
                              work["resid"].to_numpy(float))
    t_pf, (u, _) = timed(fast_pairs, panel, repeat=5)
    t_pr, (lags, _) = timed(reference_pairs, work)
    assert len(lags) == u.size
    print(f"pair step: {u.size:,} pairs; fast {t_pf * 1e3:.1f} ms, itertools loop "
          f"{t_pr * 1e3:.0f} ms, ratio {t_pr / t_pf:.0f}x")
    sv = semivariogram(panel)
    agree = np.allclose(sv.bins["gamma"], ref_vg, rtol=1e-9, equal_nan=True)
    print(f"semivariogram bins agree with the reference loop: {agree}")

    del df, work, panel, u, lags
    for n_big in n_bigs:
        large_run(n_big)
    return 0


if __name__ == "__main__":
    sys.exit(main())
