"""The model-check figures (app/figures.py) and the report's figure snippets and label tables.

References: the figures draw what ``analysis.models.checks`` computed (tested against
statsmodels in tests/test_model_checks.py), compared here value for value; point counts by
brute-force counting; labels against the declarations in ``analysis.settings`` and
``analysis.models.modelstage``; plotly's own JSON for the snippets.
"""
from __future__ import annotations

import base64
import json
import re

import numpy as np
import pandas as pd
import plotly.graph_objects as go
import pytest

from analysis.models.checks import model_checks
from analysis.models.mixed import fit_mixed
from analysis.models.mixed.simulate import simulate_cohort
from analysis.models.modelstage import CHOICE_FIELDS, ModelChoices
from analysis.output.report import choices_frame, settings_frame, stratum_frame
from analysis.settings import DECLARED, Settings
from app import palette as pal
from app.figures import (CHECK_POINTS, CohortLook, check_figures, effects_qq_figure,
                         foot_legend_bottom, report_html, residual_scatter_figure,
                         subject_fit_figure)

LOOK = CohortLook(strata=("all",), colours={"all": pal.STRATUM_COLORS[0]},
                  time_label="Months since start", time_unit="months", response="egfr",
                  response_unit="mL/min")


@pytest.fixture(scope="module")
def serial_checks():
    sim = simulate_cohort(700, seed=8, visits=(3, 8), follow_up=36.0, range=8.0)
    fit = fit_mixed(sim.panel, sim.X, names=sim.names, structure="intercept+serial")
    return model_checks(fit, name="intercept+serial (exponential, REML)",
                        subject_ids=[f"P{k}" for k in range(sim.panel.n_subjects)])


def test_residual_figures_draw_a_bounded_seeded_sample_and_the_subject(serial_checks):
    ch = serial_checks
    assert ch.n_obs > CHECK_POINTS                 # the sample is needed here
    fig = residual_scatter_figure(ch, look=LOOK, against="time", highlight_subject="P3")
    points = fig.data[0]
    assert len(points.x) <= CHECK_POINTS + len(ch.subject("P3"))
    # each drawn point is a visit of the table (time, standardised residual), brute-force join
    table = set(zip(np.round(ch.visits["time"], 9), np.round(ch.visits["standardised"], 9)))
    assert set(zip(np.round(points.x, 9), np.round(points.y, 9))) <= table
    again = residual_scatter_figure(ch, look=LOOK, against="time", highlight_subject="P3")
    np.testing.assert_array_equal(again.data[0].x, points.x)          # seeded
    assert "seed" in fig.layout.title.subtitle.text and f"{ch.n_obs:,}" in \
        fig.layout.title.subtitle.text
    hl = [t for t in fig.data if t.name == "subject P3"][0]
    np.testing.assert_allclose(hl.y, ch.subject("P3")["standardised"])
    # the page's style: the shared template, fonts and palette colours
    assert fig.layout.template.layout.paper_bgcolor is not None or fig.layout.paper_bgcolor
    assert fig.layout.font.size == 15 and pal.STRATUM_COLORS[0].lower() in \
        str(points.marker.color).lower() or "rgba(0,114,178" in str(points.marker.color)
    # under ~300 kB of data (the brief's bound for a page figure)
    assert len(fig.to_json()) < 300_000


def test_subject_figure_lines_are_the_checks_predictions(serial_checks):
    ch = serial_checks
    fig = subject_fit_figure(ch, "P5", look=LOOK)
    rows = ch.subject("P5").sort_values("time")
    by = {t.name: t for t in fig.data}
    np.testing.assert_allclose(by["visits"].y, rows["response"])
    np.testing.assert_allclose(by["population prediction (fixed effects)"].y, rows["fitted"])
    np.testing.assert_allclose(by["own prediction (+ its random effects)"].y,
                               rows["subject_fitted"])
    np.testing.assert_allclose(by["own prediction + serial component"].y, rows["serial_fitted"])
    blank = subject_fit_figure(ch, None, look=LOOK)
    assert "Click a subject" in blank.layout.annotations[0].text
    absent = subject_fit_figure(ch, "nobody", look=LOOK)
    assert "not among the subjects" in absent.layout.annotations[0].text


def test_without_serial_or_random_effects_the_figures_say_so():
    sim = simulate_cohort(40, seed=2, visits=(3, 5), serial_var=0.0, slope_var=0.0,
                          intercept_slope_cov=0.0)
    fit = fit_mixed(sim.panel, sim.X, names=sim.names, structure="independence")
    ch = model_checks(fit)
    assert "no random effects" in effects_qq_figure(ch, look=LOOK).layout.annotations[0].text
    fig = subject_fit_figure(ch, "0", look=LOOK)
    assert "no serial process" in fig.layout.title.subtitle.text
    assert [t.name for t in fig.data] == ["population prediction (fixed effects)", "visits"]
    assert len(check_figures(ch, look=LOOK, highlight_subject="0")) == 5


def test_report_snippets_draw_without_webgl_and_without_their_own_library(serial_checks):
    fig = go.Figure(go.Scattergl(x=np.linspace(0, 1, 2000), y=np.linspace(0, 2, 2000) / 3))
    html = report_html(fig)
    assert "scattergl" not in html and "Plotly.newPlot" in html
    assert re.search(r"\*\s*plotly\.js", html) is None          # no copy of the library
    data = json.loads(re.search(r"Plotly\.newPlot\(\s*\"[^\"]+\",\s*(\[.*?\]),\s*\{", html,
                                re.S).group(1))
    assert data[0]["type"] == "scatter"
    # y written as packed 32-bit floats (reference: numpy's float32 of the inputs)
    y = data[0]["y"]
    assert y["dtype"] == "f4"
    np.testing.assert_array_equal(np.frombuffer(base64.b64decode(y["bdata"]), dtype="<f4"),
                                  (np.linspace(0, 2, 2000) / 3).astype(np.float32))


def test_foot_legend_margin_grows_with_the_rows_the_legend_needs():
    short = foot_legend_bottom(["a", "b"])
    long = foot_legend_bottom([f"intercept+slope+serial (exponential, REML) {i}"
                               for i in range(5)])
    # brute force: each 45-character entry (about 8 px a character + 48 px) fills most of a
    # 780 px row, so five entries need at least four rows of 24 px more than one row
    assert long - short >= 3 * 24 and short >= 90


def test_label_tables_use_the_declared_wording():
    s = Settings(n_strata=5, require_covariate=False, transform="log2")
    frame = settings_frame(s)
    assert list(frame["setting"]) == [d.label for d in DECLARED.values()]
    value = dict(zip(frame["setting"], frame["value"]))
    assert value[DECLARED["require_covariate"].label] == "no"
    assert value[DECLARED["origin"].label] == DECLARED["origin"].choice_labels["as-is"]
    assert value[DECLARED["time_max"].label] == "none"
    ch = choices_frame(ModelChoices(structures=("intercept",), gee=()))
    assert CHOICE_FIELDS["structures"].label in set(ch["option"])
    assert dict(CHOICE_FIELDS["structures"].options())["intercept"] in set(ch["value"])
    table = pd.DataFrame({"stratum": [0, -2], "label": ["a", "All subjects"], "cov_q1": [1, 2],
                          "slope_n": [3, 4]})
    out = stratum_frame(table, covariate="upcr", unit="months")
    assert list(out.columns) == ["group", "upcr: lower quartile",
                                 "slope per month: subjects with one"]
