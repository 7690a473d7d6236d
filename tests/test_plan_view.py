"""The Plan section's pure helpers: inputs from controls, messages beside them, the figure, the
export and the simulation read-out. References: plan_study called directly (the analysis layer)."""
from __future__ import annotations

import numpy as np
import pytest

from analysis.preparation.demo import demo_roles, demo_settings, load_demo
from analysis.preparation.loading import Dataset
from analysis.models.plan_defaults import cohort_covariate
from analysis.models.planning import CovarianceModel, PlanInputs, plan_study, simulate_power
from app.sections import models as mv
from app.sections import plan as pv
from app.server import create_app
from app.session import attempt

STRUCTS = ["intercept", "intercept+slope"]


@pytest.fixture(scope="module")
def fitted():
    df = load_demo()
    keep = df["recipient_id"].drop_duplicates().iloc[:150]
    frame = df[df["recipient_id"].isin(keep)].reset_index(drop=True)
    app = create_app(dataset=Dataset.from_frame(frame, name="slice.csv"), roles=demo_roles(),
                     settings=demo_settings())
    ctx = app._cohortlens
    stores = ({"key": ctx.default_key, "name": "slice.csv"}, {"roles": demo_roles().to_dict()},
              demo_settings().to_dict())
    out = mv.fit_outputs(ctx, *stores, STRUCTS, "exponential", "reml", [], None)
    models, cohort = mv.fit_for_view(ctx, *stores, mv.choices_from_controls(
        STRUCTS, "exponential", "reml", [], None))
    return ctx, stores, out["snapshot"], models, cohort


def test_plan_from_controls_equals_plan_study(fitted):
    ctx, _, snap, models, cohort = fitted
    req = pv.request_from_controls(snap, "intercept (REML)", "continuous", -0.08, 0.05, 0.9,
                                   "0, 6, 12, 24", 0.01)
    made, unit = pv.make_plan(ctx, req)
    # reference: the analysis function with the same inputs
    direct = plan_study(PlanInputs(CovarianceModel.from_fit(models.fits["intercept (REML)"]),
                                   -0.08, (0, 6, 12, 24), covariate=cohort_covariate(cohort),
                                   power=0.9, dropout_rate=0.01))
    assert made.plan.subjects_needed == direct.subjects_needed and unit == "months"
    fig = pv.power_figure(made)
    assert fig.layout.title.text and "subjects" in fig.layout.xaxis.title.text
    assert "power" in fig.layout.yaxis.title.text and len(fig.data) == 3
    assert fig.data[2].x[0] == direct.subjects_needed
    # a control left at its shown default names the rule it came from
    base = pv.default_values(pv.make_plan(ctx, {"snapshot": snap, "model": None})[0])
    shown = pv.make_plan(ctx, {"snapshot": snap, "model": None, **base})[0]
    assert "as shown in the control" in shown.sources["schedule"]


@pytest.mark.parametrize("controls, field, pattern", [
    (("continuous", "abc", 0.05, 0.8, "0, 6", 0), "effect", "not a number"),
    (("continuous", 0.1, 0.05, 0.8, "0, x", 0), "schedule", "'x' is not a number"),
    (("continuous", 0.1, 0.05, 0.8, "0, 12, 6", 0), "schedule", "strictly increasing"),
    (("continuous", 0.1, 1.5, 0.8, "0, 6", 0), "alpha", "alpha == 1.5"),
    (("continuous", 0.1, 0.05, 0.01, "0, 6", 0), "power", "power == 0.01"),
    (("continuous", 0.1, 0.05, 0.8, "0, 6", -1), "dropout", "dropout_rate == -1"),
    (("continuous", 0, 0.05, 0.8, "0, 6", 0), "effect", "non-zero"),
])
def test_bad_inputs_give_a_message_beside_their_control(fitted, controls, field, pattern):
    ctx, _, snap, _, _ = fitted

    def run():
        return pv.make_plan(ctx, pv.request_from_controls(snap, None, *controls))

    value, msg, err = attempt(run, what="planning")
    assert value is None and pattern in msg and pv.field_of(err) == field


def test_export_includes_the_plan_made(fitted):
    ctx, stores, snap, models, _ = fitted
    req = pv.request_from_controls(snap, None, "two-groups", 0.1, 0.05, 0.8, "0, 12, 24", 0)
    _, text = mv.report_text(ctx, *stores, snap, None, req)
    direct = pv.make_plan(ctx, req)[0].plan
    assert "Plan of the next study" in text
    assert f"{direct.subjects_needed:,} subjects ({direct.per_group:,} per group)" in text
    _, without = mv.report_text(ctx, *stores, snap, None, None)
    assert "Plan of the next study" not in without


def test_simulation_text_reports_power_and_mc_se(fitted):
    ctx, _, snap, _, _ = fitted
    req = pv.request_from_controls(snap, "intercept (REML)", "two-groups", 3.0, 0.05, 0.8,
                                   "0, 12, 24", 0)
    made = pv.make_plan(ctx, req)[0]
    check = simulate_power(made.inputs, reps=4, seed=1)
    text = pv.simulation_text(check)
    # Monte-Carlo SE of a proportion sqrt(p(1-p)/reps) (common practice)
    assert f"± {np.sqrt(check.empirical_power * (1 - check.empirical_power) / 4):.3f}" in text
    assert f"{check.reps} refitted cohorts" in text
