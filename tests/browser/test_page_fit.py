"""The page at projector sizes and its number boxes, in headless Chromium.

Number boxes keep a number under their +/− buttons and the views follow; a bad value leaves
the last good settings in force with a message saying the allowed range, groups and the
address still follow, and typing a good value back recovers; a new upload resets the settings
that describe one table and says so; at 1280×800 and 1920×1080 the fixed part is at most 15%
of the height, every menu entry lies inside the viewport, check boxes sit beside their labels
and the group table fits its box; display labels replace column names.

References: the allowed ranges come from the settings' declarations (analysis.settings); the
15% budget and the table columns are the review's layout requirements.
"""
from __future__ import annotations

from urllib.parse import parse_qs, urlparse

import pytest

from analysis.preparation.demo import load_demo
from analysis.settings import DECLARED
from app import ids
from app.layout import SECTIONS
from app.sections.rate import RATE_TABLE_MAIN

from test_dashboard import CLICK_JS, TIMEOUT, figure, open_demo, wait_idle

SIZES = [(1280, 800), (1920, 1080)]


def query(page) -> dict:
    return parse_qs(urlparse(page.url).query)


def stepper(page, control_id: str, which: str) -> None:
    box = page.locator(f"#{control_id}").locator("xpath=..")
    box.locator(f".dash-stepper-{which}").click()


def wait_query(page, key: str, value: str) -> None:
    page.wait_for_function(
        "([k, v]) => new URLSearchParams(location.search).get(k) === v", arg=[key, value],
        timeout=TIMEOUT)


def test_steppers_keep_a_number_and_the_views_follow(server_url, page):
    url, _ = server_url
    open_demo(page, url)
    stepper(page, ids.SETTING_INPUT["min_visits"], "increment")
    wait_query(page, "min-visits", "4")
    assert page.input_value(f"#{ids.SETTING_INPUT['min_visits']}") == "4"
    # "−" on the window's end moves it by one; it never removes the limit
    stepper(page, ids.SETTING_INPUT["time_max"], "decrement")
    wait_query(page, "time-max", "59")
    assert page.input_value(f"#{ids.SETTING_INPUT['time_max']}") == "59"
    # the lowess span steps by its declared step
    stepper(page, ids.SETTING_INPUT["lowess_frac"], "increment")
    step = DECLARED["lowess_frac"].panel_step
    wait_query(page, "lowess-frac", f"{0.3 + step:g}")
    wait_idle(page)
    assert page.inner_text(f"#{ids.SETTINGS_STATUS}") == ""


def test_a_bad_value_keeps_the_last_good_settings(server_url, page):
    url, _ = server_url
    open_demo(page, url)
    box = page.locator(f"#{ids.SETTING_INPUT['min_visits']}")
    box.fill("0")
    box.press("Enter")
    msg = page.locator(f"#{ids.SETTING_MSG['min_visits']}")
    msg.get_by_text("Fewest visits per subject must be a whole number from 1 to 1000",
                    exact=False).wait_for(timeout=TIMEOUT)
    # choosing a group still reaches the page address
    page.locator(f"#{ids.LINK_STRATA} label").nth(1).click()
    page.wait_for_function("() => new URLSearchParams(location.search).has('stratum')",
                           timeout=TIMEOUT)
    assert "min-visits" not in query(page)              # the last good value (the demo's 3)
    # clicking a subject still follows it
    subject = page.evaluate(CLICK_JS, [ids.COURSE_GRAPH, ""])
    page.locator(f"#{ids.LINK_CARD}").get_by_text(f"Subject {subject}", exact=True).wait_for(
        timeout=TIMEOUT)
    wait_query(page, "focus", subject)
    # typing a good value back recovers
    box.fill("5")
    box.press("Enter")
    wait_query(page, "min-visits", "5")
    page.wait_for_function(f"() => document.getElementById('{ids.SETTING_MSG['min_visits']}')"
                           ".innerText === ''", timeout=TIMEOUT)


def test_a_new_upload_resets_the_window_and_says_so(server_url, page, tmp_path):
    url, _ = server_url
    df = load_demo()
    keep = df["recipient_id"].unique()[:60]
    path = tmp_path / "another_registry.csv"
    df[df["recipient_id"].isin(keep)].to_csv(path, index=False)
    open_demo(page, url)
    page.set_input_files(f"#{ids.DATA_UPLOAD} input[type=file]", str(path))
    alert = page.locator(f"#{ids.PAGE_ALERT}")
    alert.get_by_text("Window to: 60 → none", exact=False).wait_for(timeout=TIMEOUT)
    text = alert.inner_text()
    assert "Transform: log base 2 → none" in text and "Centre at: cohort median" in text
    assert page.input_value(f"#{ids.SETTING_INPUT['time_max']}") == ""
    # the address says "no upper limit" (the start-up table's link default is 60)
    page.wait_for_function("() => new URLSearchParams(location.search).get('time-max') === 'none'"
                           " && new URLSearchParams(location.search).has('data')",
                           timeout=TIMEOUT)
    wait_idle(page)


@pytest.mark.parametrize("width, height", SIZES)
def test_layout_fits_a_projector(server_url, page, artifacts, width, height):
    url, _ = server_url
    page.set_viewport_size({"width": width, "height": height})
    open_demo(page, url + "?focus=R00001")             # a followed subject: its card is open
    page.locator(".cl-card-head").wait_for(timeout=TIMEOUT)
    for anchor, label in SECTIONS:
        box = page.locator(".cl-nav a", has_text=label).bounding_box()
        assert box is not None, label
        assert box["x"] >= 0 and box["y"] >= 0, label
        assert box["x"] + box["width"] <= width and box["y"] + box["height"] <= height, label
    # follow a subject, then land on a section: header, caution and groups bar stay small
    page.evaluate(f"location.hash = '#{'section-rate'}'")
    page.wait_for_function(f"() => document.querySelector('#{RATE_TABLE_MAIN} td')",
                           timeout=TIMEOUT)
    page.wait_for_timeout(800)
    head = page.locator(".cl-head").bounding_box()
    bar = page.locator(".cl-selection").bounding_box()
    fixed = max(head["y"] + head["height"], bar["y"] + bar["height"])
    assert fixed <= 0.15 * height, (head, bar)
    # the card's visits open over the page only when asked
    card = page.locator(".cl-card-visits-toggle summary")
    card.click()
    assert page.locator(".cl-card-visits").is_visible()
    assert page.locator(".cl-selection").bounding_box()["height"] == bar["height"]
    card.click()
    # the section title is not under the fixed part
    title = page.locator("#section-rate h2").bounding_box()
    assert title["y"] >= fixed - 1
    # the group table's first-read columns fit their section
    table = page.locator(f"#{RATE_TABLE_MAIN} table").first.bounding_box()
    section = page.locator("#section-rate").bounding_box()
    assert table["x"] + table["width"] <= section["x"] + section["width"]
    heads = page.locator(f"#{RATE_TABLE_MAIN} th").all_inner_texts()
    assert [h.split(" (")[0] for h in heads[:3]] == ["group", "subjects", "median slope"]
    # a check box sits on the line of its label
    label = page.locator(f"#{ids.SETTING_INPUT['require_covariate']} label").first
    tick = label.locator("input").bounding_box()
    text = label.locator(".dash-options-list-option-text").bounding_box()
    assert text["x"] > tick["x"] and abs(text["y"] - tick["y"]) < tick["height"] + 4
    page.screenshot(path=str(artifacts / f"page_fit_{width}x{height}.png"))
    wait_idle(page)


def test_display_labels_replace_column_names(server_url, page):
    url, _ = server_url
    open_demo(page, url)
    title = figure(page, ids.COURSE_GRAPH)["layout"]["title"]["text"]
    assert "eGFR" in title and "egfr" not in title            # the demo's labels
    box = page.locator(f"#{ids.ROLE_LABEL['response']}")
    box.fill("kidney function")
    box.press("Enter")
    page.wait_for_function(
        f"() => {{ const el = document.querySelector('#{ids.COURSE_GRAPH} .js-plotly-plot');"
        " return el && el.layout && JSON.stringify(el.layout.title).includes('kidney function');"
        " }", timeout=TIMEOUT)
    assert "egfr=kidney function" in query(page).get("label", [])
    wait_idle(page)
