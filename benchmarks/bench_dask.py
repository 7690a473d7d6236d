"""In-memory engine versus the Dask cluster engine: time and peak memory per worker.

    python benchmarks/bench_dask.py                 # 1e5 and 1e6 rows
    python benchmarks/bench_dask.py --with-1e7      # also 1e7 rows (minutes; a big machine)
    python benchmarks/bench_dask.py --sizes 200000  # chosen sizes only
    python benchmarks/bench_dask.py --sizes 10000000 # 1e7 only, added to the stored runs
    python benchmarks/bench_dask.py --table          # the stored runs, nothing run

Every run is kept in ``results.json`` beside the generated data (one entry per engine, task,
size and worker count; a new run of the same configuration replaces it), and the table, the
cost per added row and the crossover are computed from every stored run, so that the slow
10^7 configurations need running once only.

A cohort is generated on disk once per size (invented: irregular visits, a random intercept
and slope, a numeric marker) as one Parquet file (read by the in-memory engine) and as 16
subject-hash partitions (read by the cluster engine). Each configuration runs in a fresh
process: ``summarize`` (every exploratory number) and ``fit`` (random intercept + slope by
REML, no GEE rows, so that a run stays short), in memory and on a LocalCluster of 1 and
2 single-threaded worker processes. Reported: wall time (including starting the cluster),
peak resident memory of the process (in memory) or of each worker, and the crossover size
where the cluster's time line meets the in-memory one (straight lines through the measured
sizes: a fixed start-up cost plus a cost per row).
"""
from __future__ import annotations

import argparse
import json
import os
import resource
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pandas as pd

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

DATA = Path(os.environ.get("COHORTLENS_BENCH_DIR", "/tmp/cohortlens-bench"))
ROLES = {"subject": "pid", "time": "t", "response": "y", "covariates": ["marker"]}
SETTINGS = {"unit": "months", "variogram_bins": 10}
STRUCTURES = ("intercept+slope",)


def generate(rows: int) -> Path:
    """The cohort with about ``rows`` visits, on disk (made once)."""
    from analysis.cluster.partitions import write_partitions

    folder = DATA / f"rows{rows}"
    if (folder / "whole.parquet").exists() and (folder / "parts").is_dir():
        return folder
    folder.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(rows)
    m = max(rows // 8, 2)
    n = rng.integers(3, 14, m)
    n = n[np.cumsum(n) <= rows] if np.sum(n) > rows else n
    m = n.size
    sid = np.repeat(np.arange(m), n)
    visit = np.arange(sid.size) - np.repeat(np.cumsum(n) - n, n)
    t = 4.0 * visit + rng.uniform(0, 3.9, sid.size).round(3)
    x = rng.lognormal(1.0, 0.8, m)
    b0, b1 = rng.normal(0, 10, m), rng.normal(0, 0.1, m)
    y = 60 + b0[sid] - (0.1 + b1[sid] + 0.02 * np.log2(x[sid])) * t + rng.normal(0, 5, sid.size)
    frame = pd.DataFrame({"pid": sid, "t": t, "y": y.round(3), "marker": x[sid].round(4)})
    frame.to_parquet(folder / "whole.parquet", index=False)
    write_partitions(frame, "pid", folder / "parts", n_parts=16)
    return folder


def run_one(engine: str, task: str, rows: int, workers: int) -> dict:
    """One configuration, in this process (called in a fresh subprocess)."""
    from analysis.models.modelstage import ModelChoices
    from analysis.settings import Roles, Settings

    folder = generate(rows)
    roles, settings = Roles.from_dict(ROLES), Settings.from_dict(SETTINGS)
    choices = ModelChoices(structures=STRUCTURES, gee=())
    start = time.perf_counter()
    worker_peaks: list[float] = []
    if engine == "memory":
        from analysis.preparation.loading import read_table

        frame = read_table(folder / "whole.parquet")
        if task == "summarize":
            from analysis.pipeline import explore
            explore(frame, roles, settings).to_json()
        else:
            from analysis.models.modelstage import fit_models
            from analysis.preparation.prepare import prepare
            fit_models(prepare(frame, roles, settings), choices).to_json()
    else:
        from analysis.cluster.engine import ClusterCohort, open_client
        from analysis.cluster.models import fit_cluster_models

        client = open_client(n_workers=workers)
        started = time.perf_counter() - start
        try:
            cc = ClusterCohort(client, str(folder / "parts"), roles, settings)
            if task == "summarize":
                cc.explore(settings).to_json()
            else:
                fit_cluster_models(cc, cc.cohort(settings), choices).to_json()
            peaks = client.run(lambda: resource.getrusage(resource.RUSAGE_SELF).ru_maxrss)
            worker_peaks = [v / 1024 for v in peaks.values()]
        finally:
            cluster = client.cluster
            client.close()
            cluster.close()
    seconds = time.perf_counter() - start
    if engine == "memory":
        started = 0.0
    own = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    return {"engine": engine, "task": task, "rows": rows, "workers": workers,
            "seconds": seconds, "start_seconds": started, "client_mb": own, "worker_mb": worker_peaks}


def stored() -> list[dict]:
    path = DATA / "results.json"
    return json.loads(path.read_text()) if path.exists() else []


def store(result: dict) -> None:
    same = ("engine", "task", "rows", "workers")
    kept = [r for r in stored() if any(r[k] != result[k] for k in same)]
    DATA.mkdir(parents=True, exist_ok=True)
    (DATA / "results.json").write_text(json.dumps(kept + [result], indent=1))


def line(r: dict) -> str:
    peak = (f"{r['client_mb']:.0f} MB" if r["engine"] == "memory" else
            " / ".join(f"{v:.0f}" for v in r["worker_mb"]) + " MB per worker"
            + f", client {r['client_mb']:.0f} MB")
    return (f"{r['task']:9s} {r['rows']:>10,} rows  {r['engine']:6s} "
            f"{'' if r['engine'] == 'memory' else str(r['workers']) + ' worker(s)':11s} "
            f"{r['seconds']:7.1f} s ({r['start_seconds']:4.1f} s starting the cluster)   "
            f"peak {peak}")


def report(results: list[dict], tasks) -> None:
    """The stored runs, the cost of each added row between sizes, and the crossovers."""
    results = sorted(results, key=lambda r: (r["task"], r["rows"], r["engine"] != "memory",
                                             r["workers"]))
    for r in results:
        print(line(r))
    for task in tasks:
        for engine, w in (("memory", 0), ("dask", 1), ("dask", 2)):
            pts = sorted((r["rows"], r["seconds"], r["worker_mb"] or [r["client_mb"]])
                         for r in results if r["task"] == task and r["engine"] == engine
                         and r["workers"] == w)
            for (n0, t0, m0), (n1, t1, m1) in zip(pts, pts[1:]):
                print(f"growth {task:9s} {engine:6s} {w} worker(s) {n0:>10,} -> {n1:>10,} rows: "
                      f"{1e6 * (t1 - t0) / (n1 - n0):6.1f} us and "
                      f"{1024 * (max(m1) - max(m0)) / (n1 - n0):5.2f} KB (largest process) "
                      "per added row")
    for task in tasks:
        mem = [(r["rows"], r["seconds"]) for r in results
               if r["task"] == task and r["engine"] == "memory"]
        for w in (1, 2):
            dk = [(r["rows"], r["seconds"]) for r in results
                  if r["task"] == task and r["engine"] == "dask" and r["workers"] == w]
            x = crossover(mem, dk)
            print(f"crossover {task}, {w} worker(s): " + (
                "needs runs at two sizes or more" if min(len(mem), len(dk)) < 2 else
                f"about {x:,.0f} rows" if x else "none in time (the cluster's cost per row is "
                "not lower on this machine)"))


def crossover(points_mem, points_dask) -> float | None:
    """Rows where the straight time lines (a + b·rows) of the two engines meet (None if they
    do not meet at a positive size)."""
    if len(points_mem) < 2 or len(points_dask) < 2:
        return None
    bm, am = np.polyfit(*zip(*points_mem), 1)
    bd, ad = np.polyfit(*zip(*points_dask), 1)
    if bd >= bm:
        return None
    return float((ad - am) / (bm - bd))


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--sizes", type=str, default="100000,1000000",
                    help="rows per generated cohort, comma-separated [100000,1000000]")
    ap.add_argument("--with-1e7", action="store_true", help="also 10,000,000 rows")
    ap.add_argument("--tasks", default="summarize,fit")
    ap.add_argument("--table", action="store_true",
                    help="print the stored runs (results.json) without running anything")
    ap.add_argument("--one", nargs=4, metavar=("ENGINE", "TASK", "ROWS", "WORKERS"),
                    help=argparse.SUPPRESS)
    args = ap.parse_args()
    if args.one:
        engine, task, rows, workers = args.one
        print(json.dumps(run_one(engine, task, int(rows), int(workers))))
        return
    sizes = [int(float(s)) for s in args.sizes.split(",") if s]
    if args.with_1e7:
        sizes.append(10_000_000)
    tasks = args.tasks.split(",")
    if args.table:
        report(stored(), tasks)
        return
    for rows in sizes:
        generate(rows)
        for task in tasks:
            for engine, workers in (("memory", 0), ("dask", 1), ("dask", 2)):
                proc = subprocess.run([sys.executable, __file__, "--one", engine, task,
                                       str(rows), str(workers)], capture_output=True, text=True,
                                      env={**os.environ, "PYTHONPATH": str(ROOT)})
                if proc.returncode:
                    print(proc.stderr[-3000:], file=sys.stderr)
                    continue
                r = json.loads(proc.stdout.strip().splitlines()[-1])
                store(r)
                print(line(r), flush=True)
    print()
    report(stored(), tasks)


if __name__ == "__main__":
    main()
