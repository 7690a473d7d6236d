"""The Models section in headless Chromium: fit the default candidates, compare, switch
REML -> ML, export the report.

Reference for what the page should show: the analysis layer's own tested driver
``analysis.models.modelling.fit_candidates`` called directly in the test on the cohort the app
prepares for the demo (``Workbench.cohort``), with the choices the panel starts from
(``ModelChoices`` defaults), and the fitted models' own ``variogram_curve``. The
empirical semivariogram under the fitted curves is recomputed from statsmodels OLS residuals of
the models' design (and checked to differ from the exploratory one of a fresh ``Workbench``).
The screenshot of the section goes to tests/browser/artifacts/ for a person to look at.
"""
from __future__ import annotations

import json
import re

import numpy as np
import pytest
import statsmodels.api as sm

from analysis.models.effects import parse_number
from analysis.models.modelling import fit_candidates
from analysis.models.modelstage import ModelChoices
from analysis.pipeline import Workbench
from analysis.exploration.variogram import semivariogram
from app import ids
# the page's figure as JSON with Plotly's packed arrays unpacked (shared with the dashboard test)
from test_dashboard import FIGURE_JS

FIT_TIMEOUT = 90_000
TIMEOUT = 60_000
EFFECT = f"#{ids.MODELS_SUMMARY} .cl-effect-main"

#: every DataTable under a selector, each as a list of rows {column id: cell text}
TABLES_JS = """(sel) => Array.from(document.querySelectorAll(sel + ' .dash-table-container'))
    .map(t => Array.from(t.querySelectorAll('tr'))
        .map(tr => Array.from(tr.querySelectorAll('td[data-dash-column]')))
        .filter(cells => cells.length > 0)
        .map(cells => Object.fromEntries(cells.map(
            c => [c.getAttribute('data-dash-column'), c.innerText.trim()]))))"""


def summary_table(page, column: str) -> list[dict]:
    """Rows of the first table in the models summary that has this column."""
    for rows in page.evaluate(TABLES_JS, f"#{ids.MODELS_SUMMARY}"):
        if rows and column in rows[0]:
            return rows
    raise AssertionError(f"no table with a {column!r} column under the models summary")


def comparison_rows(page) -> list[dict]:
    return summary_table(page, "AIC")


def wait_fitted(page, method_label: str) -> str:
    """Until the fitted results for this method show and nothing in the section is loading
    (the effect statement has text, the model details name a model fitted by this method,
    no spinner); returns the effect statement."""
    try:
        handle = page.wait_for_function(
            """([sec, effect, detail, pattern]) => {
                if (document.querySelector(sec + ' .dash-spinner')) { return false; }
                const e = document.querySelector(effect), d = document.querySelector(detail);
                const text = e ? e.innerText.trim() : '';
                const fitted = new RegExp(pattern);
                return text && d && fitted.test(d.innerText) ? text : false;
            }""", arg=["#section-models", EFFECT, f"#{ids.MODELS_DETAIL}",
                 rf"[(\s]{method_label}\)"],
            timeout=FIT_TIMEOUT)
    except Exception as exc:  # noqa: BLE001 - re-raised with what the page shows
        raise AssertionError(
            f"no {method_label} results after fitting; models message: "
            f"{page.inner_text('#' + ids.MODELS_MSG)!r}, status: "
            f"{page.inner_text('#' + ids.MODELS_STATUS)!r}") from exc
    return handle.json_value()


def section_shot(page, path) -> None:
    """The Models section cut from a full-page screenshot taken from the top of the page (an
    element screenshot scrolls the section under the sticky header, which covers its title)."""
    box = page.evaluate("""() => {
        window.scrollTo(0, 0);
        const r = document.getElementById('section-models').getBoundingClientRect();
        return {x: r.left + window.scrollX, y: r.top + window.scrollY,
                width: r.width, height: r.height}; }""")
    page.screenshot(path=str(path), full_page=True, clip=box)


def check_comparison(rows: list[dict], ref, method_label: str) -> None:
    """One row per candidate, same AIC to the displayed precision, same preferred model."""
    ref_aic = dict(zip(ref.comparison["model"], ref.comparison["aic"]))
    assert [r["model"] for r in rows] == list(ref_aic), (rows, list(ref_aic))
    assert len(rows) == len(ref.candidates)
    for r in rows:
        assert re.search(rf"[(\s]{method_label}\)$", r["model"]), r["model"]
        want = ref_aic[r["model"]]
        # the page shows AIC to 6 significant figures: agree to within half the last digit
        half_digit = 0.5 * 10 ** (np.floor(np.log10(abs(want))) - 5)
        assert parse_number(r["AIC"]) == pytest.approx(want, abs=half_digit * 1.0001), r
    starred = [r["model"] for r in rows if r["preferred"] == "★"]
    assert starred == [ref.preferred]


def test_models_fit_compare_switch_method_and_export(server_url, page, artifacts, tmp_path):
    url, dash_app = server_url
    page.goto(url)
    # the page has loaded the demo once its roles line counts subjects
    page.locator(f"#{ids.ROLES_STATUS}").get_by_text("subjects", exact=False).wait_for(
        timeout=TIMEOUT)
    page.locator("#section-models").scroll_into_view_if_needed()

    # the panel starts from the analysis layer's default choices
    checked = page.eval_on_selector_all(f"#{ids.MODELS_STRUCTURES} input:checked",
                                        "els => els.map(e => e.value)")
    choices = ModelChoices()
    assert tuple(checked) == choices.structures
    assert page.locator(f"#{ids.MODELS_METHOD} input[value='reml']").is_checked()
    assert page.locator(f"#{ids.MODELS_CORRELATION} input[value='{choices.correlation}']"
                        ).is_checked()

    page.click(f"#{ids.MODELS_FIT}")
    effect = wait_fitted(page, "REML")

    # reference: the analysis layer's fit_candidates called directly on the cohort the app
    # prepares for the demo, with the panel's choices (computed after the page's fit: the
    # server runs in this process, so fitting both at once only slows both down)
    context = dash_app._cohortlens
    dataset = context.datasets.get(context.default_key)
    roles, settings = context.default_roles, context.default_settings
    cohort = context.workbench.cohort(dataset, roles, settings)

    def reference(method: str, gee=choices.gee):
        return fit_candidates(cohort, structures=choices.structures,
                              correlation=choices.correlation, method=method,
                              mean=choices.mean_model(), gee=gee)

    ref = reference("reml")

    # 2a. comparison table
    reml_rows = comparison_rows(page)
    check_comparison(reml_rows, ref, "REML")
    # 2b. the effect statement is the analysis layer's, word for word
    assert ref.effect is not None
    assert effect == ref.effect.statement.strip()
    # 2c. overlay: the empirical points plus one curve per fitted model, each on its model
    data = json.loads(page.evaluate(FIGURE_JS, ids.MODELS_GRAPH))["data"]
    assert len(data) == len(ref.fits) + 1
    empirical = [t for t in data if t.get("mode") == "markers"]
    curves = [t for t in data if t.get("mode") == "lines"]
    assert len(empirical) == 1 and len(curves) == len(ref.fits)
    # the points: semivariogram of the OLS residuals of the models' own design (statsmodels
    # OLS residuals, then the tested exploratory estimator), not of the exploratory trend
    resid = sm.OLS(ref.panel.y, ref.design.X).fit().resid
    bins = semivariogram(ref.panel.with_y(resid), n_bins=settings.variogram_bins,
                         max_lag=settings.variogram_max_lag).to_frame()
    explore = Workbench().variogram(dataset, roles, settings).to_frame()
    assert not np.allclose(explore["gamma"].to_numpy(float), bins["gamma"].to_numpy(float),
                           equal_nan=True)
    finite = bins[np.isfinite(bins["gamma"].to_numpy(float))]
    assert empirical[0]["y"] == pytest.approx(finite["gamma"].tolist())
    for trace in curves:
        name = trace["name"].removesuffix(" ★")
        assert (trace["name"].endswith(" ★")) == (name == ref.preferred)
        x = np.asarray(trace["x"], float)
        assert trace["y"] == pytest.approx(ref.fits[name].variogram_curve(x).tolist(),
                                           rel=1e-6)
    assert {t["name"].removesuffix(" ★") for t in curves} == set(ref.fits)
    # 2d. GEE robustness rows: the time x covariate estimate of each working correlation
    term = ref.design.interaction_term
    gee_rows = {r["fit"]: r for r in summary_table(page, "robust SE") if r["term"] == term}
    assert set(gee_rows) == {g.name for g in ref.gee if g.fit is not None} and gee_rows
    for g in ref.gee:
        ff = g.fit.fixed_frame().set_index("term")
        want = float(ff.loc[term, "estimate"])
        # shown to 4 significant figures
        half_digit = 0.5 * 10 ** (np.floor(np.log10(abs(want))) - 3)
        assert parse_number(gee_rows[g.name]["estimate"]) == pytest.approx(
            want, abs=half_digit * 1.0001)

    # 5. screenshot of the fitted section (looked at by a person)
    section_shot(page, artifacts / "models-fitted-reml.png")

    # 3. REML -> ML: the status says the results are out of date, refit, values change
    page.locator(f"#{ids.MODELS_METHOD} label", has_text=re.compile(r"^\s*ML\s*$")).click()
    page.locator(f"#{ids.MODELS_STATUS}").get_by_text("earlier choices", exact=False).wait_for(
        timeout=TIMEOUT)
    page.click(f"#{ids.MODELS_FIT}")
    effect_ml = wait_fitted(page, "ML")
    # reference: fit_candidates(..., method="ml"); GEE rows do not depend on REML/ML and were
    # checked above, so they are left out of this reference fit
    ref_ml = reference("ml", gee=())
    ml_rows = comparison_rows(page)
    check_comparison(ml_rows, ref_ml, "ML")
    assert [r["AIC"] for r in ml_rows] != [r["AIC"] for r in reml_rows]
    assert effect_ml == ref_ml.effect.statement.strip()
    assert page.inner_text(f"#{ids.MODELS_STATUS}").strip() == ""
    section_shot(page, artifacts / "models-fitted-ml.png")

    # 4. export: an HTML file with both cautions and the same effect statement
    with page.expect_download(timeout=TIMEOUT) as info:
        page.click(f"#{ids.MODELS_EXPORT}")
    download = info.value
    assert download.suggested_filename.endswith(".html")
    path = tmp_path / download.suggested_filename
    download.save_as(str(path))
    text = path.read_text(encoding="utf-8")
    assert text.lstrip().lower().startswith("<!doctype html")
    assert "not for individual care decisions" in text
    assert "de-identified data" in text
    # the report is HTML-escaped; the statement's characters need no escaping but '&'/'<'
    assert ref_ml.effect.statement.strip() in text.replace("&amp;", "&").replace("&lt;", "<")
    page.locator(f"#{ids.MODELS_EXPORT_MSG}").get_by_text("Report ready", exact=False).wait_for(
        timeout=TIMEOUT)
