"""Page benchmark: how long the dashboard in a real browser takes, next to the engine.

Run:  python benchmarks/bench_page.py                    (demo registry only)
      python benchmarks/bench_page.py --subjects 120000  (also a generated cohort: the demo
                                                          repeated with new ids, 999,400 rows;
                                                          keep it to one run on a shared machine)
      python benchmarks/bench_page.py --subjects 120000 --parquet   (the large file as Parquet)

The server is started the way a person starts it (``python -m app.cli serve FILE`` with the
demo's roles and settings) in a child process, so its resident memory is its own; headless
Chromium (/usr/bin/chromium, through playwright) opens the page and then changes one control at a
time. For every action (open, fewest visits, how groups are cut, time origin, variogram bins,
click a subject) it prints the time from the action until every view that action touches has
redrawn (a graph counts as redrawn when Plotly holds a new figure for it), the engine's own
compute time for the same change (``analysis.pipeline.Workbench`` in this process, before the
server starts: a cold workbench for the first opening, a warm one for each change) and the
ratio page / engine. For the opening it also prints each figure's payload (the JSON the server
sent for it) and the whole page's callback traffic, and the server's memory (VmRSS and its peak
VmHWM from /proc).

Beside them, the floor Dash and plotly.js set in this browser, measured in the same run: a bare
Dash page with one small graph; a static page holding only the figures the dashboard sent at its
opening, at their sizes (no callbacks, no server work); and on it each action's new figures drawn
over them. The page's time above "figures alone" is its own: callbacks, server work, the rest of
its components.

Targets on the 2-core development machine (issue 12): demo open <= 2.5 s; 1 M rows open <= 8 s
after the file is loaded; any single control <= 1 s on the demo and <= 3 s at 1 M rows; each
figure <= 300 kB and the page <= 1.5 MB at 1 M rows; server memory <= 1.5 GB. Nothing here
asserts a time; ``--json OUT`` keeps the numbers.
"""
from __future__ import annotations

import argparse
import gc
import json
import os
import socket
import subprocess
import sys
import tempfile
import time
import urllib.request
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

CHROMIUM = "/usr/bin/chromium"
CHROMIUM_ARGS = ["--no-sandbox", "--disable-gpu", "--disable-background-networking",
                 "--disable-component-update", "--disable-sync", "--no-first-run"]
GRAPHS = ("course-graph", "spread-graph", "pairs-graph", "lines-graph", "rate-strata-graph",
          "rate-covariate-graph", "follow-visits-graph", "follow-dropout-graph")
SHORT = {"course-graph": "courses", "spread-graph": "semivariogram",
         "pairs-graph": "lag correlation", "lines-graph": "subject lines",
         "rate-strata-graph": "slopes by group", "rate-covariate-graph": "slope vs covariate",
         "follow-visits-graph": "visits per subject", "follow-dropout-graph": "loss to follow-up"}
ALL = set(GRAPHS)
EXPLORE = ALL
#: which graphs each action redraws (what the page should show changing)
TOUCHES = {
    "min visits": ALL,
    "strata method": ALL - {"spread-graph", "pairs-graph"},
    "time origin": ALL,
    "variogram bins": {"spread-graph"},
    "click a subject": {"course-graph", "lines-graph", "rate-strata-graph",
                        "rate-covariate-graph", "follow-visits-graph"},
}

#: records, per graph, the wall-clock ms (Date.now()) of every new figure Plotly holds
WATCH_JS = """(() => {
    window.__draws = {};
    const last = {};
    const ids = %s;
    const tick = () => {
        for (const gid of ids) {
            const el = document.querySelector('#' + gid + ' .js-plotly-plot');
            const d = el && el.data;
            if (d && d.length && d !== last[gid]) {
                last[gid] = d;
                (window.__draws[gid] = window.__draws[gid] || []).push(Date.now());
            }
        }
    };
    setInterval(tick, 10);
})();""" % json.dumps(list(GRAPHS))

IDLE_JS = "() => !document.querySelector('[data-dash-is-loading=\"true\"]')"


# ------------------------------------------------------------------ data
def _analysis():
    """(demo module, loading module) wherever this checkout keeps them (the script also runs
    on older checkouts, for before/after numbers)."""
    try:
        from analysis.preparation import demo, loading
    except ImportError:
        from analysis import demo, loading
    return demo, loading


def large_cohort_csv(subjects: int, folder: Path, parquet: bool = False) -> Path:
    """The demo registry repeated with new subject ids (responses jittered by N(0, 1)) until it
    holds ``subjects`` subjects (a multiple of the demo's 1,200), written to ``folder``."""
    import numpy as np
    import pandas as pd

    load_demo = _analysis()[0].load_demo

    base = load_demo()
    n_base = base["recipient_id"].nunique()
    reps = max(1, subjects // n_base)
    rng = np.random.default_rng(7)
    parts = []
    for r in range(reps):
        part = base.copy()
        part["recipient_id"] = part["recipient_id"] + f"-{r:03d}"
        part["egfr"] = (part["egfr"] + rng.normal(0, 1.0, len(part))).round(1)
        parts.append(part)
    frame = pd.concat(parts, ignore_index=True)
    path = folder / (f"cohort_{reps * n_base}.parquet" if parquet else
                     f"cohort_{reps * n_base}.csv")
    if parquet:
        frame.to_parquet(path, index=False)
    else:
        frame.to_csv(path, index=False)
    return path


# ------------------------------------------------------------------ engine
def engine_times(path: Path | None) -> dict:
    """Workbench compute time per action (seconds), in this process."""
    from analysis.pipeline import Workbench

    demo, loading = _analysis()
    demo_roles, demo_settings, load_demo = demo.demo_roles, demo.demo_settings, demo.load_demo
    Dataset, read_table = loading.Dataset, loading.read_table

    frame = load_demo() if path is None else read_table(path)
    dataset = Dataset.from_frame(frame)
    roles, base = demo_roles(), demo_settings()
    out = {}

    def run(wb, settings):
        gc.collect()
        t0 = time.perf_counter()
        wb.explore(dataset, roles, settings)
        return time.perf_counter() - t0

    wb = Workbench(max_entries=256)
    out["open"] = run(wb, base)
    out["min visits"] = run(wb, base.replace(min_visits=base.min_visits + 1))
    out["strata method"] = run(wb, base.replace(strata_method="equal-width"))
    out["time origin"] = run(wb, base.replace(origin="first-visit"))
    out["variogram bins"] = run(wb, base.replace(variogram_bins=base.variogram_bins + 6))
    # a click changes no stage: the engine checks the subject against the cached selection
    t0 = time.perf_counter()
    sel = wb.selection(dataset, roles, base)
    "x" in set(map(str, sel.subject_ids))
    out["click a subject"] = time.perf_counter() - t0
    del wb, frame
    gc.collect()
    return out


# ------------------------------------------------------------------ server
def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def start_server(path: Path | None, port: int):
    cmd = [sys.executable, "-m", "app.cli", "serve"]
    if path is not None:
        cmd += [str(path), "--subject", "recipient_id", "--time", "visit_date",
                "--response", "egfr", "--covariate",
                "urine_protein_ratio,centre,sex,age_at_tx,donor_type",
                "--event-date", "tx_date", "--response-unit", "mL/min/1.73m²",
                "--covariate-unit", "mg/mmol",
                "--settings", str(ROOT / "sample_data" / "demo_settings.json")]
    cmd += ["--port", str(port)]
    env = {**os.environ, "PYTHONPATH": str(ROOT)}
    t0 = time.perf_counter()
    proc = subprocess.Popen(cmd, cwd=ROOT, env=env, stdout=subprocess.DEVNULL,
                            stderr=subprocess.PIPE, text=True)
    url = f"http://127.0.0.1:{port}/"
    while True:
        if proc.poll() is not None:
            raise SystemExit(f"server stopped: {proc.stderr.read()[-2000:]}")
        try:
            with urllib.request.urlopen(url, timeout=2) as r:
                r.read()
            break
        except OSError:
            time.sleep(0.2)
    return proc, url, time.perf_counter() - t0


def memory_mb(pid: int) -> tuple[float, float]:
    """(VmRSS, VmHWM) of a process in MiB."""
    got = {}
    for line in Path(f"/proc/{pid}/status").read_text().splitlines():
        if line.startswith(("VmRSS:", "VmHWM:")):
            k, v = line.split(":", 1)
            got[k] = int(v.split()[0]) / 1024
    return got.get("VmRSS", float("nan")), got.get("VmHWM", float("nan"))


# ------------------------------------------------------------------ browser
class PageRun:
    def __init__(self, page, timeout_ms: int):
        self.page = page
        self.timeout = timeout_ms
        self.payload: dict[str, int] = {}      # graph id -> bytes of its last figure sent
        self.traffic = 0                       # bytes of every callback response
        self.requests = 0                      # callback round trips
        self.figures: dict[str, dict] = {}     # graph id -> its last figure sent
        page.on("response", self._response)

    def _response(self, response):
        if "_dash-update-component" not in response.url:
            return
        try:
            body = response.body()
        except Exception:  # noqa: BLE001 - page closing
            return
        self.traffic += len(body)
        self.requests += 1
        try:
            data = json.loads(body).get("response", {})
        except ValueError:
            return
        for gid, props in data.items():
            if gid in ALL and "figure" in props:
                self.payload[gid] = len(json.dumps(props["figure"], separators=(",", ":")))
                self.figures[gid] = props["figure"]

    def draws(self) -> dict:
        return self.page.evaluate("() => window.__draws || {}")

    def wait_redrawn(self, since_ms: float, gids) -> tuple[float | None, set]:
        """Seconds from ``since_ms`` until every graph in ``gids`` has a newer figure, and the
        set of every graph that redrew (after the page went idle)."""
        gids = sorted(gids)
        try:
            self.page.wait_for_function(
                "([t, ids]) => ids.every(g => (window.__draws[g] || []).some(x => x > t))",
                arg=[since_ms, gids], timeout=self.timeout, polling=20)
        except Exception:  # noqa: BLE001 - reported as a timeout
            return None, set()
        done = self.draws()
        last = max(max(x for x in done[g] if x > since_ms) for g in gids)
        self.idle()
        redrawn = {g for g, xs in self.draws().items() if any(x > since_ms for x in xs)}
        return (last - since_ms) / 1000.0, redrawn

    def idle(self):
        self.page.wait_for_function(IDLE_JS, timeout=self.timeout)
        self.page.wait_for_timeout(400)
        self.page.wait_for_function(IDLE_JS, timeout=self.timeout)

    def now(self) -> float:
        return self.page.evaluate("() => Date.now()")


def _page_helpers():
    """The browser tests' ways of typing a number, choosing from a dropdown and clicking a
    subject's point (one copy)."""
    sys.path.insert(0, str(ROOT / "tests" / "browser"))
    from test_dashboard import CLICK_JS, choose, set_number

    return choose, set_number, CLICK_JS


def drive(url: str, timeout_ms: int) -> dict:
    from playwright.sync_api import sync_playwright

    base = _analysis()[0].demo_settings()
    choose, set_number, click_js = _page_helpers()
    out = {"actions": {}}
    with sync_playwright() as pw:
        browser = pw.chromium.launch(executable_path=CHROMIUM, headless=True,
                                     args=CHROMIUM_ARGS)
        context = browser.new_context(viewport={"width": 1500, "height": 1000})
        page = context.new_page()
        page.set_default_timeout(timeout_ms)
        page.add_init_script(WATCH_JS)
        run = PageRun(page, timeout_ms)
        t0 = time.time() * 1000
        page.goto(url)
        secs, redrawn = run.wait_redrawn(t0, EXPLORE)
        out["actions"]["open"] = {"page": secs, "redrawn": sorted(redrawn),
                                  "round_trips": run.requests}
        out["payload"] = dict(run.payload)
        out["traffic"] = run.traffic
        drawn = {"open": dict(run.figures)}      # kept aside for the floor (not in the JSON)
        boxes = page.evaluate(BOXES_JS, list(GRAPHS))
        print(f"  open: {secs} s, figures {json.dumps(run.payload)}, traffic {run.traffic:,} B",
              flush=True)

        def act(name, do):
            n0 = run.requests
            since = run.now()
            run.figures.clear()
            do()
            secs, redrawn = run.wait_redrawn(since, TOUCHES[name])
            drawn[name] = {g: f for g, f in run.figures.items() if g in TOUCHES[name]}
            out["actions"][name] = {"page": secs, "redrawn": sorted(redrawn),
                                    "round_trips": run.requests - n0}
            print(f"  {name}: {secs} s, {len(redrawn)} views", flush=True)

        act("min visits", lambda: set_number(page, "settings-min-visits", base.min_visits + 1))
        act("strata method", lambda: page.locator("#settings-strata-method label",
                                                  has_text="equal widths").click())
        act("time origin", lambda: choose(page, "settings-origin",
                                          "Since each subject's first visit"))
        act("variogram bins", lambda: set_number(page, "settings-variogram-bins",
                                                 base.variogram_bins + 6))
        act("click a subject", lambda: page.evaluate(click_js, ["course-graph", None]))
        out["page_payload_after"] = dict(run.payload)
        context.close()
        out["floor"] = floor(browser, drawn, boxes, timeout_ms)
        browser.close()
    return out


# ------------------------------------------------------------------ floor
BOXES_JS = """(ids) => Object.fromEntries(ids.map(g => {
    const el = document.querySelector('#' + g + ' .js-plotly-plot');
    return [g, el ? [el.clientWidth, el.clientHeight] : [900, 460]]; }))"""

#: time (ms) until every given graph holds its figure, measured in the page
DRAWN_JS = """(ids) => new Promise(done => { const t0 = performance.timeOrigin;
    const tick = () => { if (ids.every(g => { const el = document.querySelector('#' + g + ' .js-plotly-plot');
        return el && el.data && el._fullLayout; })) { done(Date.now() - t0); } else { setTimeout(tick, 10); } };
    tick(); })"""

#: the page's figures for one action drawn over those already there, as a settings change does
REDRAW_JS = """async (figs) => { const t = performance.now();
    for (const [g, f] of Object.entries(figs)) {
        await Plotly.react(document.querySelector('#' + g + ' .js-plotly-plot'), f.data, f.layout); }
    return performance.now() - t; }"""


def _static_server(layout):
    """A bare Dash app serving ``layout`` on a free loopback port in a thread: (url, stop)."""
    import logging
    import threading

    import dash
    from werkzeug.serving import make_server

    logging.getLogger("werkzeug").setLevel(logging.ERROR)     # no line per request

    app = dash.Dash(__name__, assets_folder=tempfile.mkdtemp())
    app.layout = layout
    port = free_port()
    server = make_server("127.0.0.1", port, app.server, threaded=True)
    threading.Thread(target=server.serve_forever, daemon=True).start()
    return f"http://127.0.0.1:{port}/", server.shutdown


def floor(browser, drawn: dict, boxes: dict, timeout_ms: int) -> dict:
    """What Dash and plotly.js cost in this browser without the dashboard: seconds to open a
    bare Dash page holding one small graph; to open a page holding only the dashboard's
    opening figures, as sent, at their sizes (no callbacks, no server work); and, on that
    page, to draw each action's new figures over them. The page's own times above these are
    its callbacks, its server work and its other components."""
    from dash import dcc, html

    def opened(layout, gids) -> float:
        url, stop = _static_server(layout)
        try:
            context = browser.new_context(viewport={"width": 1500, "height": 1000})
            page = context.new_page()
            page.set_default_timeout(timeout_ms)
            page.goto(url)
            secs = page.evaluate(DRAWN_JS, list(gids)) / 1000.0
            return secs, context
        finally:
            stop()

    out = {}
    secs, context = opened(html.Div(html.Div(id="bare", children=dcc.Graph(
        figure={"data": [{"x": [1, 2], "y": [1, 2]}]}))), ["bare"])
    context.close()
    out["bare page"] = secs
    figures = drawn["open"]
    layout = html.Div([html.Div(id=g, style={"width": f"{boxes[g][0]}px"}, children=dcc.Graph(
        figure=f, style={"height": f"{boxes[g][1]}px"}, config={"responsive": False}))
        for g, f in figures.items()])
    secs, context = opened(layout, list(figures))
    out["open"] = secs
    page = context.pages[0]
    for name, figs in drawn.items():
        if name != "open" and figs:
            out[name] = page.evaluate(REDRAW_JS, figs) / 1000.0
    context.close()
    return out


# ------------------------------------------------------------------ report
def report(name: str, engine: dict, page: dict, load_s: float, mem: tuple) -> None:
    print(f"\n== {name}")
    print(f"server start incl. reading the file: {load_s:.1f} s; server memory after the "
          f"actions: {mem[0]:,.0f} MiB (peak {mem[1]:,.0f} MiB)")
    print(f"{'figure':<22}{'payload':>12}")
    total = 0
    for g in GRAPHS:
        b = page["payload"].get(g)
        total += b or 0
        print(f"{SHORT[g]:<22}{'—' if b is None else f'{b / 1000:,.1f} kB':>12}")
    print(f"{'all figures':<22}{total / 1000:>9,.1f} kB   (all callback responses "
          f"{page['traffic'] / 1000:,.1f} kB)")
    fl = page.get("floor", {})
    print(f"{'action':<18}{'page':>9}{'engine':>9}{'page/engine':>13}{'figures alone':>15}"
          f"{'round trips':>13}  redrawn")
    for act, r in page["actions"].items():
        p, e, f = r["page"], engine.get(act), fl.get(act)
        ratio = f"{p / e:,.0f}×" if p is not None and e and e > 0.001 else "—"
        ps = "timeout" if p is None else f"{p:.2f} s"
        es = "—" if e is None else f"{e:.3f} s"
        fs = "—" if f is None else f"{f:.2f} s"
        extra = sorted(set(r["redrawn"]) - TOUCHES.get(act, ALL))
        print(f"{act:<18}{ps:>9}{es:>9}{ratio:>13}{fs:>15}{r['round_trips']:>13}  "
              f"{len(r['redrawn'])} views" + (f" (also {', '.join(SHORT[g] for g in extra)})"
                                              if extra else ""))
    if fl:
        print(f"figures alone: the same figures drawn by Dash and plotly.js in this browser "
              f"without the dashboard (a static page opening with them; each action's figures "
              f"drawn over them there). A bare Dash page with one small graph opens in "
              f"{fl['bare page']:.2f} s.")


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--subjects", type=int, default=0,
                    help="also a generated cohort of this many subjects (multiple of 1,200)")
    ap.add_argument("--skip-demo", action="store_true", help="only the generated cohort")
    ap.add_argument("--parquet", action="store_true", help="write the generated cohort as "
                    "Parquet instead of CSV")
    ap.add_argument("--timeout", type=float, default=180, help="seconds to wait for a redraw")
    ap.add_argument("--json", default=None, metavar="OUT", help="keep the numbers as JSON")
    args = ap.parse_args(argv)
    cases = [] if args.skip_demo else [("demo registry", None)]
    results = {}
    with tempfile.TemporaryDirectory() as tmp:
        if args.subjects:
            path = large_cohort_csv(args.subjects, Path(tmp), parquet=args.parquet)
            cases.append((f"generated cohort ({path.name})", path))
        for name, path in cases:
            engine = engine_times(path)
            print(f"{name}: engine {json.dumps(engine)}", flush=True)
            proc, url, load_s = start_server(path, free_port())
            try:
                page = drive(url, int(args.timeout * 1000))
                mem = memory_mb(proc.pid)
            finally:
                proc.terminate()
                proc.wait(timeout=20)
            report(name, engine, page, load_s, mem)
            results[name] = {"engine": engine, "page": page, "server_start": load_s,
                             "memory_mib": mem}
    if args.json:
        Path(args.json).write_text(json.dumps(results, indent=1))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
