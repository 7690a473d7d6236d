"""A review meeting in headless Chromium: the summary strip, presentation mode through the page
address and the keyboard, and a choices file saved from the page and opened again.

Reference for the numbers: the analysis layer run directly (``Workbench.cohort`` through
``analysis.output.overview.cohort_overview``) and the command line (``cohortlens summarize demo
--settings FILE``) on the file the page saved. Screenshots go to tests/browser/artifacts/ for a
person to look at.
"""
from __future__ import annotations

import json
import re

from analysis.output.overview import cohort_overview
from analysis.pipeline import Workbench
from analysis.preparation.demo import demo_roles, demo_settings, load_demo
from analysis.preparation.loading import Dataset
from app.cli import main as cli_main

TIMEOUT = 60_000


def _wait_strip(page):
    page.wait_for_selector("#summary-cohort", timeout=TIMEOUT)


def _strip_counts(page) -> tuple[int, int]:
    text = page.inner_text("#summary-cohort")
    m = re.search(r"([\d,]+) subjects, ([\d,]+) visits", text)
    assert m, text
    return int(m.group(1).replace(",", "")), int(m.group(2).replace(",", ""))


def _top_gap(page, anchor: str) -> float:
    """Distance from the bottom of what stays fixed (header; the groups bar when sticky) to the
    top of a section."""
    return page.evaluate("""(id) => {
        const head = document.querySelector('.cl-head').getBoundingClientRect().bottom;
        const bar = document.querySelector('.cl-selection');
        const target = document.getElementById(id);
        const after = bar && getComputedStyle(bar).position === 'sticky' &&
            (bar.compareDocumentPosition(target) & Node.DOCUMENT_POSITION_FOLLOWING);
        const fixed = head + (after ? bar.getBoundingClientRect().height : 0);
        return target.getBoundingClientRect().top - fixed; }""", anchor)


def test_summary_strip_shows_the_cohort_numbers(server_url, page):
    url, _ = server_url
    page.set_viewport_size({"width": 1280, "height": 800})
    page.goto(url)
    _wait_strip(page)
    # reference: the analysis layer straight on the demo with the demo's settings
    cohort = Workbench().cohort(Dataset.from_frame(load_demo()), demo_roles(), demo_settings())
    ov = cohort_overview(cohort)
    assert _strip_counts(page) == (ov.subjects, ov.visits)
    assert page.get_attribute("#summary-cohort", "href") == "#section-kept"
    assert page.get_attribute("#summary-answer", "href") == "#section-models"
    assert f"{len(ov.group_sizes)} groups" in page.inner_text("#summary-groups")
    # compact: at most two lines before the models are fitted (line height of the strip text)
    lines = page.evaluate("""() => { const s = document.getElementById('summary-strip');
        const lh = parseFloat(getComputedStyle(s).lineHeight);
        return (s.getBoundingClientRect().height - 2 * parseFloat(getComputedStyle(s).paddingTop)) / lh; }""")
    assert lines <= 2.2, lines


def test_presentation_mode_round_trips_through_the_url_and_steps_by_keyboard(server_url, page,
                                                                             artifacts):
    url, _ = server_url
    page.set_viewport_size({"width": 1280, "height": 800})
    page.goto(url + "?present=1")
    _wait_strip(page)
    page.wait_for_function("document.body.classList.contains('cl-present')", timeout=TIMEOUT)
    page.wait_for_selector("#kept-table td", timeout=TIMEOUT)
    assert not page.is_visible(".cl-side")                       # settings column hidden
    assert page.inner_text("#present-toggle") == "Leave presentation"
    root_px = page.evaluate("parseFloat(getComputedStyle(document.documentElement).fontSize)")
    assert root_px > 17                                           # the working page's 17 px
    main_w = page.evaluate("document.querySelector('.cl-main').getBoundingClientRect().width")
    assert main_w > 1100                                          # the whole width for views
    page.screenshot(path=str(artifacts / "review-present-1280.png"))
    # figures' fonts grow with the page's (the figure style's base size, app/figures.py FONT)
    from app.figures import FONT
    font_js = ("(((document.querySelector('#course-graph .js-plotly-plot') || {})._fullLayout"
               " || {}).font || {}).size")                   # as drawn: layout over template
    page.wait_for_function(f"{font_js} > {FONT['size']}", timeout=TIMEOUT)

    # the keyboard steps through the page: each press moves down, and the sections come to
    # the top one after another (a section taller than the screen one screen at a time)
    page.mouse.click(5, 790)                                      # focus the page, not a field
    reached, last_y = [], page.evaluate("window.scrollY")
    for _ in range(12):
        page.keyboard.press("PageDown")
        y = page.evaluate("window.scrollY")
        assert y > last_y, "Page Down did not move the page"
        last_y = y
        for anchor in ("section-data", "section-kept", "section-course"):
            if anchor not in reached and abs(_top_gap(page, anchor)) <= 12:
                reached.append(anchor)
        if "section-course" in reached:
            break
    assert reached == ["section-data", "section-kept", "section-course"], reached
    page.screenshot(path=str(artifacts / "review-present-courses-1280.png"))
    page.keyboard.press("PageUp")
    assert abs(_top_gap(page, "section-kept")) <= 12               # back one section
    page.keyboard.press("Home")
    assert page.evaluate("window.scrollY") == 0

    # toggling off drops the flag and shows the settings again; on again writes it back
    page.click("#present-toggle")
    page.wait_for_function("!location.search.includes('present')", timeout=TIMEOUT)
    page.wait_for_function("!document.body.classList.contains('cl-present')", timeout=TIMEOUT)
    assert page.is_visible(".cl-side")
    assert page.inner_text("#present-toggle") == "Present"
    page.wait_for_function(f"{font_js} === {FONT['size']}", timeout=TIMEOUT)
    page.click("#present-toggle")
    page.wait_for_function("location.search.includes('present=1')", timeout=TIMEOUT)
    page.wait_for_function("document.body.classList.contains('cl-present')", timeout=TIMEOUT)
    # Escape leaves presentation mode
    page.mouse.click(5, 790)
    page.keyboard.press("Escape")
    page.wait_for_function("!location.search.includes('present')", timeout=TIMEOUT)


def test_choices_file_saved_from_the_page_opens_again_and_runs_in_the_cli(server_url, page,
                                                                          artifacts, tmp_path):
    url, _ = server_url
    page.set_viewport_size({"width": 1280, "height": 800})
    page.goto(url)
    _wait_strip(page)
    start = _strip_counts(page)
    field = page.locator("#settings-min-visits")
    field.fill("6")
    field.press("Enter")
    page.wait_for_function("location.search.includes('min-visits=6')", timeout=TIMEOUT)
    page.wait_for_function(f"!document.getElementById('summary-cohort').innerText"
                           f".startsWith('{start[0]:,} subjects')", timeout=TIMEOUT)
    shown = _strip_counts(page)
    page.click("#models-correlation input[value=gaussian]")
    with page.expect_download() as info:
        page.click("#travel-export")
    saved = tmp_path / "exported.json"
    info.value.save_as(saved)
    doc = json.loads(saved.read_text(encoding="utf-8"))
    assert doc["settings"]["min_visits"] == 6 and doc["roles"]["subject"] == "recipient_id"
    assert doc["models"]["correlation"] == "gaussian"

    # the command line reads the saved file and finds the page's numbers
    out = tmp_path / "summary.json"
    assert cli_main(["summarize", "demo", "--settings", str(saved), "--json", str(out)]) == 0
    cli = json.loads(out.read_text(encoding="utf-8"))
    assert (cli["cohort"]["subjects"], cli["cohort"]["observations"]) == shown

    # back to the start-up choices, then open the file: the page returns to the saved choices
    page.click("#settings-reset")
    page.wait_for_function("!location.search.includes('min-visits')", timeout=TIMEOUT)
    page.click("#models-correlation input[value=exponential]")
    page.set_input_files("#travel-import input[type=file]", str(saved))
    page.wait_for_function("location.search.includes('min-visits=6')", timeout=TIMEOUT)
    page.wait_for_function("document.getElementById('settings-min-visits').value === '6'",
                           timeout=TIMEOUT)
    page.wait_for_function("document.querySelector('#models-correlation input[value=gaussian]')"
                           ".checked", timeout=TIMEOUT)
    page.wait_for_function(f"document.getElementById('summary-cohort').innerText"
                           f".startsWith('{shown[0]:,} subjects')", timeout=TIMEOUT)
    assert _strip_counts(page) == shown
    assert "Applied" in page.inner_text("#travel-note")

    # the same file again, after a change, applies it again
    field.fill("4")
    field.press("Enter")
    page.wait_for_function("location.search.includes('min-visits=4')", timeout=TIMEOUT)
    page.set_input_files("#travel-import input[type=file]", str(saved))
    page.wait_for_function("location.search.includes('min-visits=6')", timeout=TIMEOUT)

    # a wrong file changes nothing and names the key
    bad = tmp_path / "bad.json"
    bad.write_text('{"settings": {"min_visits": 0}}', encoding="utf-8")
    page.set_input_files("#travel-import input[type=file]", str(bad))
    page.wait_for_function("document.getElementById('travel-msg').innerText"
                           ".includes('settings.min_visits')", timeout=TIMEOUT)
    assert "min-visits=6" in page.url
    page.locator(".cl-travel").scroll_into_view_if_needed()
    page.screenshot(path=str(artifacts / "review-travel-1280.png"))
