"""Engine profile at registry scale: where Workbench.explore spends its time per settings change.

Run:  python benchmarks/profile_engine.py [--subjects 120000] [--profile] [--top 25]

Builds the page benchmark's generated cohort (``bench_page.large_cohort_csv``: the demo repeated
with new ids) once and keeps it as Parquet in /tmp, then times ``Workbench.explore`` cold and
after each single settings change (the same changes as the page benchmark), with the per-stage
compute counts, and with ``--profile`` the cProfile top functions of each change. Nothing is
asserted; on a shared machine keep it to one run.
"""
from __future__ import annotations

import argparse
import cProfile
import gc
import io
import pstats
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "benchmarks"))


def cohort_path(subjects: int) -> Path:
    path = Path(f"/tmp/engine_{subjects // 1000}k.parquet" if subjects != 120_000
                else "/tmp/engine_1m.parquet")
    if not path.exists():
        import tempfile

        from bench_page import large_cohort_csv
        with tempfile.TemporaryDirectory() as tmp:
            made = large_cohort_csv(subjects, Path(tmp), parquet=True)
            made.replace(path)
    return path


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--subjects", type=int, default=120_000)
    ap.add_argument("--profile", action="store_true")
    ap.add_argument("--top", type=int, default=25)
    args = ap.parse_args()

    from analysis.pipeline import Workbench
    from analysis.preparation.demo import demo_roles, demo_settings
    from analysis.preparation.loading import Dataset, read_table

    path = cohort_path(args.subjects)
    t0 = time.perf_counter()
    frame = read_table(path)
    dataset = Dataset.from_frame(frame)
    print(f"load {path.name}: {len(frame):,} rows in {time.perf_counter() - t0:.2f} s")
    roles, base = demo_roles(), demo_settings()
    wb = Workbench(max_entries=256)
    actions = [("open (cold)", base),
               ("fewest visits +1", base.replace(min_visits=base.min_visits + 1)),
               ("strata method", base.replace(strata_method="equal-width")),
               ("time origin", base.replace(origin="first-visit")),
               ("variogram bins", base.replace(variogram_bins=base.variogram_bins + 6))]
    for name, settings in actions:
        gc.collect()
        before = dict(wb.compute_counts)
        prof = cProfile.Profile() if args.profile else None
        c0 = time.process_time()
        t0 = time.perf_counter()
        if prof:
            prof.enable()
        wb.explore(dataset, roles, settings)
        if prof:
            prof.disable()
        secs = time.perf_counter() - t0
        cpu = time.process_time() - c0
        ran = {k: v - before.get(k, 0) for k, v in wb.compute_counts.items()
               if v - before.get(k, 0)}
        print(f"{name:18s} {secs:6.2f} s (cpu {cpu:5.2f} s)  stages {ran}", flush=True)
        if prof:
            out = io.StringIO()
            pstats.Stats(prof, stream=out).sort_stats("cumulative").print_stats(args.top)
            print(out.getvalue())


if __name__ == "__main__":
    main()
