"""Models section: the view's functions through the app's Workbench cache.

References: the analysis layer's own tested driver ``fit_candidates`` (called
directly), statsmodels MixedLM for the random intercept + slope fixed effects,
and brute-force recomputation of the fitted semivariogram formula.
"""
from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm

import analysis.models.modelstage as modelstage
from analysis.preparation.demo import demo_roles, demo_settings, load_demo
from analysis.errors import ModelError
from analysis.preparation.loading import Dataset
from analysis.models.modelling import fit_candidates
from analysis.models.modelstage import ModelChoices
from app.figures import OVERLAY_CAPTION
from app.sections import models as mv
from app.server import create_app
from app.session import attempt

N_SUBJECTS = 200
STRUCTS = ["intercept", "intercept+slope"]


@pytest.fixture(scope="module")
def demo_slice() -> pd.DataFrame:
    df = load_demo()
    keep = df["recipient_id"].drop_duplicates().iloc[:N_SUBJECTS]
    return df[df["recipient_id"].isin(keep)].reset_index(drop=True)


def _app(frame):
    app = create_app(dataset=Dataset.from_frame(frame, name="slice.csv"), roles=demo_roles(),
                     settings=demo_settings())
    ctx = app._cohortlens
    stores = ({"key": ctx.default_key, "name": "slice.csv"}, {"roles": demo_roles().to_dict()},
              demo_settings().to_dict())
    return ctx, stores


@pytest.fixture(scope="module")
def fitted(demo_slice):
    ctx, stores = _app(demo_slice)
    out = mv.fit_outputs(ctx, *stores, STRUCTS, "exponential", "reml", [], None)
    choices = mv.choices_from_controls(STRUCTS, "exponential", "reml", [], None)
    models, cohort = mv.fit_for_view(ctx, *stores, choices)
    return ctx, stores, out, models, cohort


def test_comparison_equals_direct_fit_candidates(fitted):
    ctx, stores, out, models, cohort = fitted
    # reference: the analysis layer's tested driver, called directly on the same cohort
    direct = fit_candidates(cohort, structures=tuple(STRUCTS), correlation="exponential",
                            method="reml")
    pd.testing.assert_frame_equal(models.to_frame().reset_index(drop=True),
                                  direct.to_frame().reset_index(drop=True), rtol=1e-8)
    assert out["chosen"] == direct.preferred
    assert out["msg"] == ""
    # the starred row of the displayed table is the lowest AIC (brute force over the direct fits)
    table = mv.model_tables(models, unit="months").comparison
    best = min(direct.fits.items(), key=lambda kv: kv[1].aic)[0]
    assert table.loc[table["preferred"] == "★", "model"].tolist() == [best]


def _mixedlm_intercept_slope(panel, X):
    """statsmodels MixedLM, random intercept + slope, time rescaled to [0, 1] for its optimiser.

    Columns 1 (time) and 3 (time × x) are divided by c = max|t|, so their
    coefficients are multiplied back by 1/c; the fixed effects are otherwise
    unchanged (REML fixed effects are equivariant under column scaling).
    """
    c = float(np.max(np.abs(panel.time)))
    d = np.array([1.0, 1.0 / c, 1.0, 1.0 / c])
    exog_re = np.column_stack([np.ones(panel.n_obs), panel.time / c])
    model = sm.MixedLM(panel.y, X * d, groups=panel.codes, exog_re=exog_re)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        res = model.fit(reml=True, method=["bfgs", "lbfgs"], gtol=1e-10, maxiter=2000)
    return np.asarray(res.fe_params) * d


def test_fixed_effects_match_statsmodels(fitted):
    ctx, stores, out, models, cohort = fitted
    fit = models.fits["intercept+slope (REML)"]
    panel = cohort.panel
    x = cohort.baseline["x"].to_numpy(float)[panel.codes]
    X = np.column_stack([np.ones(panel.n_obs), panel.time, x, panel.time * x])
    assert models.n_dropped == 0 and list(fit.names) == ["intercept", "time", "x", "time × x"]
    # reference library: statsmodels MixedLM (REML, random intercept and slope)
    np.testing.assert_allclose(fit.beta, _mixedlm_intercept_slope(panel, X), rtol=1e-4)
    # and the displayed estimates are those numbers
    shown = mv.model_tables(models, "intercept+slope (REML)").fixed
    np.testing.assert_allclose([float(v.replace("−", "-")) for v in shown["estimate"]],
                               fit.beta, rtol=1e-3)


def test_changing_variogram_bins_does_not_refit(demo_slice, monkeypatch):
    calls = []

    def counting(*a, **k):
        calls.append(k.get("structures"))
        return fit_candidates(*a, **k)

    monkeypatch.setattr(modelstage, "fit_candidates", counting)
    ctx, (data, roles, settings) = _app(demo_slice)
    args = (["intercept"], "exponential", "reml", [], None)
    first = mv.fit_outputs(ctx, data, roles, settings, *args)
    again = mv.fit_outputs(ctx, data, roles, {**settings, "variogram_bins": 6}, *args)
    assert len(calls) == 1
    assert first["snapshot"]["key"] == again["snapshot"]["key"]
    # the figure follows the new bins (6 empirical points) without a refit
    assert len(again["fig"].data[0].x) <= 6 < len(first["fig"].data[0].x)
    # a cohort setting and a model choice do refit
    mv.fit_outputs(ctx, data, roles, {**settings, "min_visits": 4}, *args)
    assert len(calls) == 2
    mv.fit_outputs(ctx, data, roles, settings, ["intercept"], "exponential", "ml", [], None)
    assert len(calls) == 3
    assert ctx.workbench.compute_counts["models"] == 3


def test_overlay_figure_curves_and_labels(fitted):
    ctx, stores, out, models, cohort = fitted
    fig = out["fig"]
    assert fig.layout.title.text and fig.layout.xaxis.title.text == "time apart (months)"
    assert fig.layout.yaxis.title.text == "semivariance, (mL/min/1.73m²)²"
    assert fig.layout.title.text.startswith("egfr: ")
    names = [t.name for t in fig.data]
    assert names[0].startswith("empirical") and len(names) == 1 + len(models.fits)
    fit = models.fits["intercept+slope (REML)"]
    trace = next(t for t in fig.data if t.name.startswith("intercept+slope"))
    u = np.asarray(trace.x, float)
    v = fit.variance
    # brute force: tau^2 + 0.5 * slope_var * u^2 (random intercept cancels in differences)
    np.testing.assert_allclose(trace.y, v["error_var"] + 0.5 * v["slope_var"] * u ** 2,
                               rtol=1e-12)


def test_detail_and_report_use_the_cache(fitted):
    ctx, stores, out, models, cohort = fitted
    before = ctx.workbench.compute_counts["models"]
    detail = mv.detail_children(models, "intercept (REML)", unit="months")
    assert "intercept (REML)" in detail[0].children
    name, text = mv.report_text(ctx, *stores, out["snapshot"], "intercept (REML)")
    assert name == "cohortlens-report-slice.html"
    assert models.effect.statement in text.replace("&#x27;", "'")
    assert ctx.workbench.compute_counts["models"] == before


@pytest.mark.parametrize("controls, pattern", [
    (([], "exponential", "reml", [], None), "Tick at least one covariance structure"),
    ((["intercept"], "spherical", "reml", [], None), "correlation == 'spherical'"),
    ((["intercept"], "exponential", "reml", ["urine_protein_ratio"], None), "primary covariate"),
    ((["intercept"], "exponential", "reml", ["not_a_column"], None), "not one of the baseline"),
    ((["intercept"], "exponential", "reml", [], 2.5), "whole number"),
])
def test_bad_choices_give_a_message_not_a_traceback(demo_slice, controls, pattern):
    ctx, stores = _app(demo_slice)
    value, message, err = attempt(lambda: mv.fit_outputs(ctx, *stores, *controls),
                                  what="fitting the models")
    assert value is None and isinstance(err, ModelError)
    assert pattern in message and "Traceback" not in message


def test_model_choices_round_trip_and_keys():
    c = ModelChoices(structures=("intercept", "serial"), correlation="gaussian", method="ml",
                     confounders=("age_at_tx",), time_spline_df=3.0)
    assert c.time_spline_df == 3
    assert ModelChoices.from_dict(c.to_dict()) == c
    assert ModelChoices.from_dict(c.to_dict()).key() == c.key()
    assert c.key() != ModelChoices().key()
    with pytest.raises(ModelError, match="unknown model option"):
        ModelChoices.from_dict({"structure": ["intercept"]})
    with pytest.raises(ModelError, match="no covariance structure chosen"):
        ModelChoices(structures=())
    with pytest.raises(ModelError, match=r"structures \['slope'\] not known"):
        ModelChoices(structures=("slope",))


def test_confounder_options_exclude_the_primary_covariate():
    roles = {"roles": demo_roles().to_dict()}
    opts = mv.confounder_options(roles, demo_settings().to_dict())
    values = [o["value"] for o in opts]
    assert "urine_protein_ratio" not in values
    assert values == [c for c in demo_roles().covariates if c != "urine_protein_ratio"]


def test_overlay_points_come_from_the_models_mean(fitted):
    ctx, stores, out, models, cohort = fitted
    fig = out["fig"]
    panel = models.panel
    # reference: OLS residuals of the models' own design by statsmodels, then a brute-force
    # per-subject pair loop (half squared differences binned on equal-width lags)
    r = sm.OLS(panel.y, models.design.X).fit().resid
    lags, halves = [], []
    for s, n in zip(panel.starts, panel.counts):
        t, e = panel.time[s:s + n], r[s:s + n]
        i, j = np.triu_indices(n, 1)
        lags.append(t[j] - t[i])
        halves.append(0.5 * (e[j] - e[i]) ** 2)
    lags, halves = np.concatenate(lags), np.concatenate(halves)
    settings = demo_settings()
    n_bins, max_lag = settings.variogram_bins, settings.variogram_max_lag
    inside = lags <= max_lag
    lags, halves = lags[inside], halves[inside]
    idx = np.minimum((lags / (max_lag / n_bins)).astype(int), n_bins - 1)
    ref = np.array([halves[idx == b].mean() for b in range(n_bins) if np.any(idx == b)])
    np.testing.assert_allclose(np.asarray(fig.data[0].y, float), ref, rtol=1e-9)
    assert "OLS" in fig.data[0].name
    # ... which differs from the exploratory (smooth-trend) semivariogram
    dataset, r_, s_ = ctx.inputs(*stores)
    explore = ctx.workbench.variogram(dataset, r_, s_).to_frame()["gamma"].dropna().to_numpy()
    assert explore.size != ref.size or not np.allclose(explore, ref)
    assert "not of the smooth trend used for exploration" in OVERLAY_CAPTION


def test_small_cohort_says_intervals_rest_on_corrections(demo_slice):
    keep = demo_slice["recipient_id"].drop_duplicates().iloc[:20]
    ctx, stores = _app(demo_slice[demo_slice["recipient_id"].isin(keep)].reset_index(drop=True))
    out = mv.fit_outputs(ctx, *stores, ["intercept"], "exponential", "reml", [], None)
    text = str(out["summary"])
    assert "small-sample corrections" in text and "Satterthwaite" in text
    choices = mv.choices_from_controls(["intercept"], "exponential", "reml", [], None)
    models, _ = mv.fit_for_view(ctx, *stores, choices)
    assert models.n_subjects < 30
    assert "small-sample corrections" in str(mv.detail_children(models, None, unit="months"))
    _, html_text = mv.report_text(ctx, *stores, out["snapshot"], None)
    assert "small-sample corrections" in html_text
    # the 200-subject cohort does not carry the sentence
    ctx2, stores2 = _app(demo_slice)
    big, _ = mv.fit_for_view(ctx2, *stores2, choices)
    assert big.n_subjects >= 30
    assert "small-sample corrections" not in str(mv.summary_children(big, unit="months"))
