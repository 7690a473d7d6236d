"""Two browser sessions on one server, and the upload size limit, in headless Chromium.

References: the analysis layer's effect statement and x description from a fresh
``Workbench`` per session's settings (nothing cached, so nothing borrowed from the other
session); the limit and the file size the test itself chooses.
"""
from __future__ import annotations

import json

import pytest

from analysis.preparation.demo import demo_roles, demo_settings, load_demo
from analysis.preparation.loading import Dataset
from analysis.models.modelstage import ModelChoices
from analysis.pipeline import Workbench
from analysis.output.report import x_description
from app import ids
from conftest import serving
from test_models import wait_fitted

TIMEOUT = 60_000
REQUEST_BYTES = 64 * 1024 + 4096      # a small limit: pages refuse files over 3 KB


@pytest.fixture(scope="module")
def small_server():
    from app.server import create_app

    df = load_demo()
    keep = df["recipient_id"].unique()[:250]
    dataset = Dataset.from_frame(df[df["recipient_id"].isin(keep)].reset_index(drop=True),
                                 name="registry subset")
    dash_app = create_app(dataset=dataset, roles=demo_roles(), settings=demo_settings(),
                          max_request_bytes=REQUEST_BYTES)
    with serving(dash_app) as url:
        yield url, dataset


def _open(page, url):
    page.goto(url)
    page.locator(f"#{ids.ROLES_STATUS}").get_by_text("subjects", exact=False).wait_for(
        timeout=TIMEOUT)


def _fit(page) -> tuple[str, str]:
    page.locator("#section-models").scroll_into_view_if_needed()
    page.click(f"#{ids.MODELS_FIT}")
    effect = wait_fitted(page, "REML")
    return effect, page.inner_text(f"#{ids.MODELS_DETAIL}")


def test_two_sessions_each_read_their_own_scale(small_server, browser):
    url, dataset = small_server
    pages = []
    for _ in range(2):
        ctx = browser.new_context(viewport={"width": 1400, "height": 1000})
        pages.append(ctx.new_page())
    first, second = pages
    try:
        _open(first, url)                                   # demo settings: log2, median
        effect_1, _ = _fit(first)
        _open(second, url + "?transform=none&center=none")
        effect_2, detail_2 = _fit(second)
    finally:
        for p in pages:
            p.context.close()
    for s, effect in ((demo_settings(), effect_1),
                      (demo_settings().replace(transform="none", center="none"), effect_2)):
        fresh = Workbench()
        ref = fresh.models(dataset, demo_roles(), s, ModelChoices())
        assert effect == ref.effect.statement.strip()
    assert effect_2.startswith("Each one-unit increase")
    ref_x = x_description(Workbench().cohort(dataset, demo_roles(),
                                             demo_settings().replace(transform="none",
                                                                     center="none")))
    assert "not centred" in ref_x and ref_x in detail_2 and "median" not in detail_2


def test_a_file_over_the_limit_is_refused_with_a_message(small_server, page, tmp_path):
    url, _ = small_server
    _open(page, url)
    page.wait_for_selector(f"#{ids.DATA_UPLOAD_LIMIT}")
    assert "3 KB" in page.inner_text(f"#{ids.DATA_UPLOAD_LIMIT}")
    before = page.inner_text(f"#{ids.DATA_NAME}")
    big = tmp_path / "too_big.csv"
    big.write_text("id,time,y\n" + "".join(f"{i},{i},{i}\n" for i in range(2000)))
    assert big.stat().st_size > 3 * 1024
    page.set_input_files(f"#{ids.DATA_UPLOAD} input[type=file]", str(big))
    msg = page.locator(f"#{ids.DATA_UPLOAD_MSG}")
    msg.get_by_text("cohortlens serve FILE", exact=False).wait_for(timeout=TIMEOUT)
    assert "too_big.csv" in msg.inner_text() and "up to 3 KB" in msg.inner_text()
    assert page.inner_text(f"#{ids.DATA_NAME}") == before      # nothing was sent or loaded


def test_columns_with_names_thousands_of_characters_long(server_url, page, tmp_path):
    """Reference: the names the test builds; the display length app.text.LABEL_CHARS."""
    from test_dashboard import (TIMEOUT as DRAW_TIMEOUT, UPLOAD_COLUMNS, choose, figure,
                                upload_frame, wait_drawn)

    from app.text import LABEL_CHARS, short, shorten_columns

    url, _ = server_url
    long = {c: f"{c}_" + "x" * 4000 for c in UPLOAD_COLUMNS}
    frame = upload_frame(60).rename(columns={v: long[k] for k, v in UPLOAD_COLUMNS.items()})
    path = tmp_path / "long names.csv"
    frame.to_csv(path, index=False)
    _open(page, url)
    page.set_input_files(f"#{ids.DATA_UPLOAD} input[type=file]", str(path))
    page.wait_for_function("() => document.getElementById('data-name').innerText"
                           ".includes('long names.csv')", timeout=DRAW_TIMEOUT)
    # the page renames such columns on loading (option values that long stall the tab)
    new = dict(shorten_columns(frame)[1])
    assert "shortened" in page.inner_text(f"#{ids.DATA_UPLOAD_MSG}")
    for role, col in (("subject", "recipient_id"), ("time", "visit_date"),
                      ("event_date", "tx_date"), ("response", "egfr"),
                      ("covariates", "urine_protein_ratio")):
        choose(page, ids.ROLE_INPUT[role], short(new[long[col]]))
    # a new table starts from the neutral time origin ('as given'), which dates cannot use
    choose(page, ids.SETTING_INPUT["origin"], "Since each subject's event date")
    for gid in (ids.COURSE_GRAPH, ids.SPREAD_GRAPH):
        layout = json.dumps(wait_drawn(page, gid)["layout"])
        assert gid != ids.COURSE_GRAPH or "egfr_xx" in layout   # the response named, cut short
        assert "x" * LABEL_CHARS not in layout
    headers = page.eval_on_selector_all(f"#{ids.DATA_PREVIEW} th",
                                        "els => els.map(e => e.innerText.length)")
    assert headers and max(headers) <= LABEL_CHARS + 20
    assert figure(page, ids.COURSE_GRAPH) is not None
