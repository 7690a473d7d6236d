"""Real-browser fixtures: the app served on 127.0.0.1 (free port) and headless Chromium.

Chromium must be at /usr/bin/chromium (tests/run.sh installs it); without it the
browser tests fail with a message instead of skipping.
"""
from __future__ import annotations

import os
import threading
from contextlib import contextmanager
from pathlib import Path

import pytest

CHROMIUM = "/usr/bin/chromium"
ARTIFACTS = Path(__file__).resolve().parent / "artifacts"
CHROMIUM_ARGS = ["--no-sandbox", "--disable-gpu", "--disable-background-networking",
                 "--disable-component-update", "--disable-sync", "--no-first-run"]


def pytest_collection_modifyitems(items):
    for item in items:
        if "tests/browser" in str(item.fspath).replace(os.sep, "/"):
            item.add_marker(pytest.mark.browser)


@pytest.fixture(scope="session")
def artifacts() -> Path:
    ARTIFACTS.mkdir(exist_ok=True)
    return ARTIFACTS


@contextmanager
def serving(dash_app):
    """``dash_app`` served on an ephemeral loopback port; yields its URL."""
    from werkzeug.serving import make_server

    server = make_server("127.0.0.1", 0, dash_app.server, threaded=True)
    thread = threading.Thread(target=server.serve_forever, daemon=True)
    thread.start()
    try:
        yield f"http://127.0.0.1:{server.server_port}/"
    finally:
        server.shutdown()
        thread.join(timeout=5)


@pytest.fixture(scope="session")
def server_url():
    """The demo dashboard on an ephemeral loopback port for the whole session."""
    from app.server import create_app

    dash_app = create_app()
    with serving(dash_app) as url:
        yield url, dash_app


@pytest.fixture(scope="session")
def browser():
    if not os.path.exists(CHROMIUM):
        pytest.fail(f"Chromium not found at {CHROMIUM}: install it (bash tests/run.sh does) "
                    "to run the browser tests", pytrace=False)
    from playwright.sync_api import sync_playwright

    with sync_playwright() as pw:
        b = pw.chromium.launch(executable_path=CHROMIUM, headless=True, args=CHROMIUM_ARGS)
        try:
            yield b
        finally:
            b.close()


@pytest.fixture()
def page(browser):
    """A fresh context per test; console errors and page errors fail the test at the end."""
    context = browser.new_context(viewport={"width": 1500, "height": 1000},
                                  accept_downloads=True)
    pg = context.new_page()
    errors: list[str] = []
    pg.on("console", lambda m: errors.append(f"console {m.type}: {m.text}")
          if m.type == "error" else None)
    pg.on("pageerror", lambda e: errors.append(f"page error: {e}"))
    pg.set_default_timeout(30_000)
    yield pg
    context.close()
    assert errors == [], "browser reported errors:\n" + "\n".join(errors)


#: figures whose margins plotly.js had to widen to fit their labels, legend or colour bar
#: (it then draws the figure a second time): {graph id: {side: [set, drawn]}}
WIDENED_MARGINS_JS = """() => { const out = {};
  document.querySelectorAll('.js-plotly-plot').forEach(gd => {
    const fl = gd._fullLayout;
    if (!fl || !gd.data || !gd.data.length) { return; }
    const set = (gd.layout && gd.layout.margin) || {}, got = {};
    for (const side of ['l', 'r', 't', 'b']) {
      if (fl._size[side] > (set[side] || 0) + 0.5) { got[side] = [set[side], Math.round(fl._size[side])]; }
    }
    if (Object.keys(got).length) { out[gd.parentNode.id || gd.id] = got; }
  });
  return out; }"""


def widened_margins(page, widths=(1500, 1280)) -> dict:
    """{viewport width: figures whose margins plotly widened} at each of ``widths`` (the page
    is resized to each and its figures redrawn to the new size; it ends at the last)."""
    out = {}
    for w in widths:
        page.set_viewport_size({"width": w, "height": 1000})
        page.wait_for_timeout(600)             # plotly's resize handler redraws each figure
        got = page.evaluate(WIDENED_MARGINS_JS)
        if got:
            out[w] = got
    return out
