"""The "Plan the next study" section in headless Chromium: fit models, see the plan.

Reference: :func:`analysis.models.planning.plan_study` called directly in the test with the inputs the
page shows in its controls (model chosen, effect, schedule, dropout rate, alpha, power) and the
covariance of that model fitted by the analysis layer's own driver
(:func:`analysis.models.modelling.fit_candidates`) on the cohort the app prepares for the demo.
The screenshot of the section goes to tests/browser/artifacts/ for a person to look at.
"""
from __future__ import annotations

import re

from analysis.preparation.demo import DEMO_CSV, demo_roles, demo_settings
from analysis.preparation.loading import Dataset, read_table
from analysis.models.modelling import fit_candidates
from analysis.models.modelstage import ModelChoices
from analysis.pipeline import Workbench
from analysis.models.plan_defaults import cohort_covariate
from analysis.models.planning import CovarianceModel, PlanInputs, plan_study
from app import ids

TIMEOUT = 90_000
KEEP = ("intercept", "intercept+slope")


def test_plan_after_fitting_equals_plan_study(server_url, page, artifacts):
    url, _ = server_url
    page.goto(url)
    page.locator(f"#{ids.ROLES_STATUS}").get_by_text("subjects", exact=False).wait_for(
        timeout=TIMEOUT)
    # before fitting: a hint, no inputs
    assert "Fit the models" in page.inner_text("#plan-hint")
    assert not page.locator("#plan-body").is_visible()
    # fit two structures only (quicker)
    for box in page.query_selector_all(f"#{ids.MODELS_STRUCTURES} input:checked"):
        if box.get_attribute("value") not in KEEP:
            box.click()
    page.click(f"#{ids.MODELS_FIT}")
    page.wait_for_function(
        """() => { const n = document.getElementById('plan-needed');
                   const e = document.getElementById('plan-effect');
                   return n && e && e.value !== '' && !document.querySelector(
                       '#section-plan .dash-spinner'); }""", timeout=TIMEOUT)
    page.wait_for_timeout(1500)          # the defaults fill the controls, the plan follows them
    shown = int(page.inner_text("#plan-needed").replace(",", ""))
    model = page.inner_text("#plan-model").replace("★", "").strip()
    effect = float(page.input_value("#plan-effect"))
    schedule = [float(v) for v in page.input_value("#plan-schedule").split(",")]
    dropout = float(page.input_value("#plan-dropout"))
    alpha = float(page.input_value("#plan-alpha"))
    power = float(page.input_value("#plan-power"))

    ds = Dataset.from_frame(read_table(DEMO_CSV), name="demo")
    cohort = Workbench().cohort(ds, demo_roles(), demo_settings())
    choices = ModelChoices(structures=KEEP)
    ref = fit_candidates(cohort, structures=choices.structures, mean=choices.mean_model(),
                         gee=())
    assert model == ref.preferred
    direct = plan_study(PlanInputs(CovarianceModel.from_fit(ref.fits[model], model), effect,
                                   schedule, covariate=cohort_covariate(cohort), alpha=alpha,
                                   power=power, dropout_rate=dropout))
    assert shown == direct.subjects_needed, (shown, direct.subjects_needed)
    # the per-structure table lists every fitted candidate
    table = page.inner_text("#plan-table")
    assert all(name in table for name in ref.fits)
    # inputs still at their defaults say where they came from
    assumptions = page.inner_text("#plan-assumptions")
    assert "lowest AIC" in assumptions and "as shown in the control" in assumptions
    fig = page.evaluate("document.querySelector('#plan-graph .js-plotly-plot').layout")
    assert "Power" in fig["title"]["text"] and "subjects" in fig["xaxis"]["title"]["text"]

    # a bad schedule: the message sits beside the control, no traceback
    page.fill("#plan-schedule", "0, 12, six")
    page.press("#plan-schedule", "Enter")
    page.locator("#plan-schedule-msg").get_by_text("not a number").wait_for(timeout=TIMEOUT)
    page.fill("#plan-schedule", ", ".join(f"{t:g}" for t in schedule))
    page.press("#plan-schedule", "Enter")
    page.locator("#plan-needed").wait_for(timeout=TIMEOUT)

    # the simulation check with the smallest bounded count: power ± its Monte-Carlo SE
    page.click("#plan-sim-reps")
    page.locator(".dash-dropdown-option", has_text="20 cohorts").click()
    page.click("#plan-simulate")
    page.locator("#plan-sim-out").get_by_text("Simulated power").wait_for(timeout=TIMEOUT)
    sim = page.inner_text("#plan-sim-out")
    m = re.search(r"Simulated power ([\d.]+) ± ([\d.]+) .* from (\d+) refitted cohorts of "
                  r"([\d,]+) subjects", sim)
    assert m, sim
    p_hat, se, reps = float(m.group(1)), float(m.group(2)), int(m.group(3))
    assert reps <= 20 and int(m.group(4).replace(",", "")) == shown
    # Monte-Carlo SE of a proportion sqrt(p(1-p)/reps) (common practice), to the 3 decimals shown
    assert abs(se - (p_hat * (1 - p_hat) / reps) ** 0.5) < 2e-3

    # the sticky header would cover part of a full-page cut; let it scroll away for the picture
    page.add_style_tag(content=".cl-head, .cl-selection { position: static !important; }")
    box = page.evaluate("""() => { window.scrollTo(0, 0);
        const r = document.getElementById('section-plan').getBoundingClientRect();
        return {x: r.left + window.scrollX, y: r.top + window.scrollY,
                width: r.width, height: r.height}; }""")
    page.screenshot(path=str(artifacts / "plan_section.png"), full_page=True, clip=box)
