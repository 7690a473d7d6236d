"""Load test of the dashboard server: loopback clients replaying the page's own callbacks.

Run:  python benchmarks/bench_load.py                      (demo registry, 8 clients, 30 s)
      python benchmarks/bench_load.py --seconds 10 --clients 4
      python benchmarks/bench_load.py --rows 1000000 --seconds 20   (a large generated cohort;
                                                                   keep it short on a shared machine)

The server is the real app (``app.server.create_app``) served by werkzeug's ``make_server`` in a
thread, in a child process of its own so that its resident memory (RSS, from /proc) is the
server's alone and the clients do not share its interpreter. The payloads are built from the
app's callback map: every callback that reads the data, roles and settings stores (the cohort
table, the subject card and the six views), as the page sends them to /_dash-update-component.
Each client cycles through a few settings (variogram bins, groups, lag window, transform) so
that some requests hit the result cache and some recompute.

Prints requests, errors, latency p50/p95/max (ms) per callback and overall, and the server's
RSS before the load (after one warm-up pass) and after it. Nothing here asserts a time.
"""
from __future__ import annotations

import argparse
import json
import multiprocessing as mp
import threading
import time
import urllib.error
import urllib.request
from collections import defaultdict

# the callbacks replayed (keyed by their first output) and the settings variants cycled
VIEW_OUTPUTS = ("kept-table", "link-card", "course-graph", "spread-graph", "pairs-graph",
                "lines-graph", "rate-strata-graph", "follow-visits-graph")
VARIANTS = (
    {},
    {"variogram_bins": 12},
    {"n_strata": 3},
    {"lag_width": 4.0},
    {"transform": "log10", "center": "mean"},
    {"variogram_bins": 8, "n_strata": 5},
)


# ------------------------------------------------------------------ the server (child process)
def large_cohort(rows: int):
    """The demo registry repeated with new subject ids (and jittered responses) up to ``rows``."""
    import numpy as np
    import pandas as pd

    from analysis.preparation.demo import load_demo

    base = load_demo()
    reps = max(1, -(-rows // len(base)))
    rng = np.random.default_rng(7)
    parts = []
    for r in range(reps):
        part = base.copy()
        part["recipient_id"] = part["recipient_id"].astype(str) + f"-{r}"
        part["egfr"] = part["egfr"] + rng.normal(0, 1.0, len(part))
        parts.append(part)
    return pd.concat(parts, ignore_index=True).iloc[:rows]


def serve(rows: int, cache_mb: float, port_queue) -> None:
    import logging

    from werkzeug.serving import make_server

    from analysis.preparation.demo import demo_roles, demo_settings
    from analysis.preparation.loading import Dataset
    from app.server import create_app

    if rows:
        dataset = Dataset.from_frame(large_cohort(rows), name=f"generated {rows:,} rows")
        app = create_app(dataset=dataset, roles=demo_roles(), settings=demo_settings(),
                         cache_mb=cache_mb)
    else:
        app = create_app(cache_mb=cache_mb)
    logging.getLogger("werkzeug").setLevel(logging.ERROR)     # no line per request
    server = make_server("127.0.0.1", 0, app.server, threaded=True)
    thread = threading.Thread(target=server.serve_forever, daemon=True)
    thread.start()
    port_queue.put((server.server_port, app._cohortlens.default_key))
    thread.join()


def rss_mb(pid: int) -> float:
    with open(f"/proc/{pid}/status") as fh:
        for line in fh:
            if line.startswith("VmRSS:"):
                return int(line.split()[1]) / 1024
    return float("nan")


# ------------------------------------------------------------------ payloads
def _outputs(key: str) -> list[dict]:
    parts = key.strip(".").split("...") if key.startswith("..") else [key]
    out = []
    for p in parts:
        cid, prop = p.rsplit(".", 1)
        out.append({"id": cid, "property": prop})
    return out


def build_payloads(data_key: str) -> list[tuple[str, dict]]:
    """(name, body) for every replayed callback under each settings variant."""
    from analysis.preparation.demo import demo_roles, demo_settings
    from app import controls as ctl
    from app.server import create_app

    app = create_app()
    base = demo_settings()
    roles = {"roles": demo_roles().to_dict(), "problems": {}}
    values = {"store-data": {"key": data_key, "name": "bench"}, "store-roles": roles,
              "store-subject": None, "link-strata": None, "course-draw": 60,
              "course-seed": 1, "lines-order": "slope"}
    payloads = []
    for variant in VARIANTS:
        settings = base.replace(**variant).to_dict()
        assert ctl.settings_from_controls(ctl.control_values(base.replace(**variant)),
                                          fallback=base)[0] is not None
        values["store-settings"] = settings
        for key, spec in app.callback_map.items():
            outputs = _outputs(key)
            name = outputs[0]["id"]
            if name not in VIEW_OUTPUTS:
                continue
            inputs = [{**i, "value": values.get(i["id"])} for i in spec["inputs"]]
            state = [{**s, "value": None} for s in spec.get("state", [])]
            body = {"output": key, "outputs": outputs if len(outputs) > 1 else outputs[0],
                    "inputs": inputs, "state": state,
                    "changedPropIds": ["store-settings.data"]}
            payloads.append((name, body))
    return payloads


# ------------------------------------------------------------------ clients
def send(url: str, body: dict) -> tuple[float, bool]:
    """POST one callback; (seconds, ok). 204 is Dash's 'nothing to update' and counts as ok."""
    req = urllib.request.Request(url, data=json.dumps(body).encode(), method="POST",
                                 headers={"Content-Type": "application/json"})
    t0 = time.perf_counter()
    try:
        with urllib.request.urlopen(req, timeout=120) as resp:
            resp.read()
            ok = resp.status in (200, 204)
    except urllib.error.HTTPError as exc:
        ok = exc.code == 204
    except OSError:
        ok = False
    return time.perf_counter() - t0, ok


def client(url: str, payloads, stop_at: float, offset: int, results, lock) -> None:
    i = offset
    local = []
    while time.perf_counter() < stop_at:
        name, body = payloads[i % len(payloads)]
        i += 1
        dt, ok = send(url, body)
        local.append((name, dt, ok))
    with lock:
        results.extend(local)


def pct(values, q):
    values = sorted(values)
    if not values:
        return float("nan")
    k = min(len(values) - 1, max(0, int(round(q / 100 * (len(values) - 1)))))
    return values[k]


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--seconds", type=float, default=30.0, help="load duration [30]")
    ap.add_argument("--clients", type=int, default=8, help="concurrent clients [8]")
    ap.add_argument("--rows", type=int, default=0,
                    help="serve a generated cohort of this many rows instead of the demo")
    ap.add_argument("--cache-mb", type=float, default=1024.0, help="server memory budget [1024]")
    args = ap.parse_args(argv)

    ctx = mp.get_context("spawn")
    q = ctx.Queue()
    proc = ctx.Process(target=serve, args=(args.rows, args.cache_mb, q), daemon=True)
    t_start = time.perf_counter()
    proc.start()
    try:
        port, data_key = q.get(timeout=600)
        url = f"http://127.0.0.1:{port}/_dash-update-component"
        print(f"server pid {proc.pid} on port {port}, data {'demo' if not args.rows else f'{args.rows:,} rows'}, "
              f"started in {time.perf_counter() - t_start:.1f} s")
        payloads = build_payloads(data_key)
        print(f"{len(payloads)} payloads ({len(VIEW_OUTPUTS)} callbacks x {len(VARIANTS)} settings)")
        rss0 = rss_mb(proc.pid)
        t0 = time.perf_counter()
        warm = [send(url, body) for _, body in payloads[:len(VIEW_OUTPUTS)]]   # first settings
        if not all(ok for _, ok in warm):
            print("warning: some warm-up requests failed")
        rss_warm = rss_mb(proc.pid)
        print(f"RSS at start {rss0:.0f} MB, after one warm-up pass {rss_warm:.0f} MB "
              f"({time.perf_counter() - t0:.1f} s)")

        results: list = []
        lock = threading.Lock()
        stop_at = time.perf_counter() + args.seconds
        threads = [threading.Thread(target=client, args=(url, payloads, stop_at,
                                                         k * len(payloads) // args.clients,
                                                         results, lock))
                   for k in range(args.clients)]
        peak = rss_warm
        for t in threads:
            t.start()
        while any(t.is_alive() for t in threads):
            time.sleep(0.5)
            peak = max(peak, rss_mb(proc.pid))
        for t in threads:
            t.join()
        rss1 = rss_mb(proc.pid)

        by = defaultdict(list)
        errors = defaultdict(int)
        for name, dt, ok in results:
            by[name].append(dt * 1000)
            errors[name] += not ok
        print(f"\n{args.clients} clients for {args.seconds:g} s: {len(results)} requests, "
              f"{sum(errors.values())} errors, {len(results) / args.seconds:.1f} requests/s")
        print(f"{'callback':22s} {'n':>6s} {'err':>4s} {'p50 ms':>8s} {'p95 ms':>8s} {'max ms':>8s}")
        for name in VIEW_OUTPUTS:
            v = by.get(name, [])
            print(f"{name:22s} {len(v):6d} {errors[name]:4d} {pct(v, 50):8.0f} {pct(v, 95):8.0f} "
                  f"{(max(v) if v else float('nan')):8.0f}")
        allv = [dt * 1000 for _, dt, _ in results]
        print(f"{'all':22s} {len(allv):6d} {sum(errors.values()):4d} {pct(allv, 50):8.0f} "
              f"{pct(allv, 95):8.0f} {(max(allv) if allv else float('nan')):8.0f}")
        print(f"\nserver RSS: before load {rss_warm:.0f} MB, peak {peak:.0f} MB, after {rss1:.0f} MB "
              f"(budget --cache-mb {args.cache_mb:g})")
    finally:
        proc.terminate()
        proc.join(timeout=10)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
