"""A cohort above the summary threshold in headless Chromium: every figure stays within its
payload budget, the per-subject views show summaries and say so, and clicking a percentile band
selects a subject in that band.

Size: the demo registry repeated with new subject ids to 6,000 subjects (about 50,000 rows), as
large as keeps this test under a minute on the CI machine; the budgets (300 kB per figure,
1.5 MB for the page) are those stated for 1 M rows, which the summaries keep whatever the size.
Reference for the band: the group's slopes from the analysis layer (Workbench) and
numpy.percentile.
"""
from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest

from analysis.exploration.digest import SUMMARY_SUBJECTS
from analysis.pipeline import Workbench
from analysis.preparation.demo import demo_roles, demo_settings, load_demo
from analysis.preparation.loading import Dataset
from app import ids

from conftest import serving, widened_margins

GRAPHS = (ids.COURSE_GRAPH, ids.SPREAD_GRAPH, ids.PAIRS_GRAPH, ids.LINES_GRAPH,
          ids.RATE_STRATA_GRAPH, ids.RATE_COVARIATE_GRAPH, ids.FOLLOW_VISITS_GRAPH,
          ids.FOLLOW_DROPOUT_GRAPH)
FIGURE_BUDGET = 300_000
PAGE_BUDGET = 1_500_000
TIMEOUT = 90_000
COPIES = 5

#: click the middle band point of the first group's slope percentiles, as Plotly's plotly_click
#: would; returns its customdata [subject, group, lower percent, upper percent]
CLICK_BAND_JS = """(gid) => {
    const el = document.querySelector('#' + gid + ' .js-plotly-plot');
    const unpack = (v) => (v && v._inputArray) ? Array.from(v._inputArray) : v;
    for (let c = 0; c < el.data.length; c++) {
        const cd = unpack(el.data[c].customdata) || [];
        if (cd.length > 100 && Array.isArray(cd[0]) && cd[0].length === 4) {
            const i = Math.floor(cd.length / 2);
            el.emit('plotly_click', {points: [{curveNumber: c, pointNumber: i, pointIndex: i,
                customdata: cd[i], data: el.data[c]}]});
            return cd[i];
        }
    }
    return null;
}"""


@pytest.fixture(scope="module")
def large():
    base = load_demo()
    parts = []
    for r in range(COPIES):
        part = base.copy()
        part["recipient_id"] = part["recipient_id"] + f"-{r}"
        parts.append(part)
    frame = pd.concat(parts, ignore_index=True)
    return Dataset.from_frame(frame, name="generated cohort")


@pytest.fixture(scope="module")
def large_url(large):
    from app.server import create_app

    dash_app = create_app(dataset=large, roles=demo_roles(), settings=demo_settings())
    with serving(dash_app) as url:
        yield url


def test_large_cohort_stays_within_budget_and_a_band_click_selects_a_subject(
        large, large_url, page, artifacts):
    sizes: dict[str, int] = {}
    traffic = []

    def on_response(response):
        if "_dash-update-component" not in response.url:
            return
        body = response.body()
        traffic.append(len(body))
        for gid, props in json.loads(body).get("response", {}).items():
            if gid in GRAPHS and "figure" in props:
                sizes[gid] = len(json.dumps(props["figure"], separators=(",", ":")))

    page.on("response", on_response)
    page.goto(large_url)
    for gid in GRAPHS:
        page.wait_for_function(
            "(gid) => { const el = document.querySelector('#' + gid + ' .js-plotly-plot');"
            " return el && el.data && el.data.length > 0; }", arg=gid, timeout=TIMEOUT)
    page.wait_for_function("() => !document.querySelector('[data-dash-is-loading=\"true\"]')",
                           timeout=TIMEOUT)
    ref = Workbench().subject_lines(large, demo_roles(), demo_settings())
    assert len(ref) > SUMMARY_SUBJECTS           # the cohort is above the threshold
    assert set(sizes) == set(GRAPHS), sizes
    over = {g: n for g, n in sizes.items() if n > FIGURE_BUDGET}
    assert not over, f"figures over {FIGURE_BUDGET:,} bytes: {over}"
    assert sum(traffic) < PAGE_BUDGET, f"page traffic {sum(traffic):,} bytes"
    # the summarised views say so in their notes (figure subtitles)
    for gid in (ids.LINES_GRAPH, ids.RATE_STRATA_GRAPH, ids.RATE_COVARIATE_GRAPH):
        subtitle = page.evaluate(
            "(gid) => { const t = document.querySelector('#' + gid + ' .js-plotly-plot')"
            ".layout.title; return (t.subtitle && t.subtitle.text) || ''; }", gid)
        assert f"summary of all {len(ref):,} subjects" in subtitle, (gid, subtitle)
    # the summaries' margins hold their labels, legends and colour bar (see test_dashboard)
    assert widened_margins(page) == {}
    page.set_viewport_size({"width": 1500, "height": 1000})
    page.screenshot(path=str(artifacts / "large-cohort-lines.png"), full_page=False)
    page.locator(f"#{ids.LINES_GRAPH}").screenshot(path=str(artifacts / "large-cohort-bands.png"))
    page.locator("#section-rate").screenshot(path=str(artifacts / "large-cohort-rate.png"))

    clicked = page.evaluate(CLICK_BAND_JS, ids.LINES_GRAPH)
    assert clicked is not None, "no band trace in the subject lines view"
    subject, group, lo_pct, hi_pct = clicked
    page.locator(f"#{ids.LINK_CARD}").get_by_text(f"Subject {subject}", exact=True).wait_for(
        timeout=TIMEOUT)
    # reference: numpy.percentile of that group's slopes, from the analysis layer directly
    slopes = ref.loc[ref["stratum_label"].astype(str) == group, "slope"].to_numpy(float)
    slopes = slopes[np.isfinite(slopes)]
    lo, hi = np.percentile(slopes, [lo_pct, hi_pct])
    mine = float(ref.loc[ref["subject"].astype(str) == subject, "slope"].iloc[0])
    assert lo <= mine <= hi
    # the band's subjects are listed under the view, the selected one among them
    members = page.locator(f"#{ids.LINES_MEMBERS}")
    members.get_by_text("percentile of slope", exact=False).wait_for(timeout=TIMEOUT)
    listed = members.inner_text().split(": ")[-1].split(", ")
    in_band = set(ref.loc[(ref["stratum_label"].astype(str) == group)
                          & (ref["slope"] >= lo) & (ref["slope"] <= hi), "subject"].astype(str))
    assert listed and set(listed) <= in_band
    # the selected subject is highlighted in the band view
    page.wait_for_function(
        "(name) => document.querySelector('#lines-graph .js-plotly-plot').data"
        ".some(t => t.name === name)", arg=f"subject {subject}", timeout=TIMEOUT)
    page.locator(f"#{ids.LINES_GRAPH}").screenshot(
        path=str(artifacts / "large-cohort-band-clicked.png"))
