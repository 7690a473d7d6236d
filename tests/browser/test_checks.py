"""The Model checks section in headless Chromium, at 1280×800: fit, read the checks of the
preferred model for a highlighted subject, switch model; and the fitted-semivariogram chart's
axis title clear of its legend.

Reference for the numbers: the analysis layer's ``analysis.models.checks.checks_for`` on the
cohort and model set the app cached (its values are tested against statsmodels MixedLM and a
dense computation in tests/test_model_checks.py); the subject's visits from the prepared
cohort's own frame (pandas). Screenshots go to tests/browser/artifacts/ for a person to look at.
"""
from __future__ import annotations

import json

import numpy as np

from analysis.models.checks import checks_for
from analysis.models.modelstage import ModelChoices
from app import ids
from app.sections import checks as sec
from test_dashboard import FIGURE_JS

FIT_TIMEOUT = 120_000
#: the brief's bound on one figure's data on the page
MAX_FIGURE_BYTES = 300_000

BOXES_JS = """(gid) => {
    const el = document.querySelector('#' + gid);
    const box = (s) => { const n = el.querySelector(s); if (!n) return null;
        const r = n.getBoundingClientRect(); return [r.left, r.top, r.right, r.bottom]; };
    return {legend: box('.legend'), xtitle: box('.xtitle')};
}"""


def _overlap(a, b) -> bool:
    return not (a[2] <= b[0] or b[2] <= a[0] or a[3] <= b[1] or b[3] <= a[1])


def test_model_checks_for_the_highlighted_subject(server_url, browser, artifacts):
    url, dash_app = server_url
    context = dash_app._cohortlens
    dataset = context.datasets.get(context.default_key)
    roles, settings = context.default_roles, context.default_settings
    cohort = context.workbench.cohort(dataset, roles, settings)
    frame = cohort.frame
    subject = str(frame["subject"].iloc[0])
    page = browser.new_context(viewport={"width": 1280, "height": 800}).new_page()
    errors: list[str] = []
    page.on("pageerror", lambda e: errors.append(str(e)))
    page.goto(f"{url}?focus={subject}")
    page.locator(f"#{ids.ROLES_STATUS}").get_by_text("subjects", exact=False).wait_for(
        timeout=60_000)
    # before any fit the section says what to do
    assert "Fit the models" in page.inner_text(f"#{sec.HINT}")
    page.click(f"#{ids.MODELS_FIT}")
    page.wait_for_function(
        "(g) => { const el = document.querySelector('#' + g + ' .js-plotly-plot');"
        " return el && el.data && el.data.length >= 2; }", arg=sec.GRAPHS["subject"],
        timeout=FIT_TIMEOUT)

    models = context.workbench.models(dataset, roles, settings, ModelChoices())
    chosen = page.eval_on_selector(f"#{sec.MODEL} .Select-value-label, #{sec.MODEL}",
                                   "e => e.innerText")
    assert models.preferred in chosen
    ref = checks_for(cohort, models)           # the preferred model, as the chooser's default

    # the subject figure: its visits are the cohort's visits of that subject (pandas)
    fig = json.loads(page.evaluate(FIGURE_JS, sec.GRAPHS["subject"]))
    visits = [t for t in fig["data"] if t.get("name") == "visits"][0]
    rows = frame[frame["subject"].astype(str) == subject].sort_values("time")
    np.testing.assert_allclose(visits["y"], rows["response"].to_numpy(float))
    own = [t for t in fig["data"] if t.get("name", "").startswith("own prediction (")][0]
    np.testing.assert_allclose(own["y"], ref.subject(subject).sort_values("time")[
        "subject_fitted"].to_numpy(float), rtol=1e-9)

    # every figure is drawn, within the size bound, the subject marked in the residual plots
    for key, gid in sec.GRAPHS.items():
        data = page.evaluate(FIGURE_JS, gid)
        assert data is not None, key
        assert len(data) < MAX_FIGURE_BYTES, (key, len(data))
    qq = json.loads(page.evaluate(FIGURE_JS, sec.GRAPHS["qq"]))
    assert any(t.get("name") == f"subject {subject}" for t in qq["data"])

    # the fitted-semivariogram chart: the axis title does not sit on the legend
    page.locator(f"#{ids.MODELS_GRAPH}").scroll_into_view_if_needed()
    boxes = page.evaluate(BOXES_JS, ids.MODELS_GRAPH)
    assert boxes["legend"] and boxes["xtitle"] and not _overlap(boxes["legend"], boxes["xtitle"])
    page.locator(f"#{ids.MODELS_GRAPH}").screenshot(
        path=str(artifacts / "models-fitted-variogram-1280.png"))

    # another model: the random-effects plot follows its structure (one panel for a random
    # intercept alone)
    page.locator(f"#{sec.ANCHOR}").scroll_into_view_if_needed()
    page.locator(f"#{sec.GRAPHS['fitted']}").screenshot(
        path=str(artifacts / "checks-residuals-1280.png"))
    page.click(f"#{sec.MODEL}")
    page.get_by_role("option", name="intercept (REML)", exact=True).click()
    page.wait_for_function(
        "(g) => { const el = document.querySelector('#' + g + ' .js-plotly-plot');"
        " return el && el.layout && el.layout.annotations && el.layout.annotations.length == 1"
        " && el.layout.annotations[0].text.startsWith('random intercept'); }",
        arg=sec.GRAPHS["effects"], timeout=60_000)
    page.locator(f"#{sec.GRAPHS['effects']}").scroll_into_view_if_needed()
    page.screenshot(path=str(artifacts / "checks-section-1280.png"))
    assert errors == []
