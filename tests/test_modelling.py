"""Candidate-fitting driver end to end on a small simulated cohort."""
import json
from types import SimpleNamespace

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from analysis.errors import ModelError
from analysis.models.gee import gee_fit
from analysis.models.mean_model import MeanModel, design
from analysis.models.mixed import fit_mixed
from analysis.models.modelling import fit_candidates, model_name
from analysis.preparation.panel import Panel
from analysis.settings import Roles, Settings


def _cohort(m=70, seed=21, n_missing=4):
    rng = np.random.default_rng(seed)
    counts = rng.integers(3, 7, m)
    subj = np.repeat(np.arange(m), counts)
    t = np.concatenate([np.sort(rng.uniform(0, 36, c)) for c in counts])
    x = rng.normal(0, 1, m)
    sex = rng.choice(["F", "M"], m)
    b0, b1 = rng.normal(0, 6, m), rng.normal(0, 0.15, m)
    y = (55 + b0[subj] + (-0.1 - 0.04 * x[subj] + b1[subj]) * t - 3 * x[subj]
         + rng.normal(0, 3, t.size))
    panel = Panel.from_codes(subj, t, y)
    xb = x.copy()
    xb[rng.choice(m, n_missing, replace=False)] = np.nan
    base = pd.DataFrame({"subject": np.arange(m), "x": xb, "marker": 2.0 ** xb, "sex": sex})
    return SimpleNamespace(panel=panel, baseline=base, covariate="marker",
                           settings=Settings(transform="log2"),
                           roles=Roles(subject="id", time="t", response="eGFR"))


@pytest.fixture(scope="module")
def result():
    c = _cohort()
    return c, fit_candidates(c, structures=("intercept", "intercept+slope"),
                             mean=MeanModel(confounders=("sex",)), gee=("exchangeable",))


def test_drops_missing_and_matches_direct_fits(result):
    c, ms = result
    keep = c.baseline["x"].notna().to_numpy()  # reference: pandas notna
    assert ms.n_dropped == int((~keep).sum()) == 4
    assert any(n.endswith("4 of 70 subjects dropped: missing value of 'marker'") for n in ms.notes)
    panel = c.panel.subset_subjects(keep)
    base = c.baseline[keep].reset_index(drop=True)
    d = design(panel, base, MeanModel(confounders=("sex",)))
    # reference: the engine called directly on the same complete-case data
    direct = fit_mixed(panel, d.X, names=d.names, structure="intercept+slope")
    mine = ms.fits["intercept+slope (REML)"]
    np.testing.assert_allclose(mine.beta, direct.beta, rtol=1e-10)
    np.testing.assert_allclose(mine.loglik, direct.loglik, rtol=1e-10)
    g = gee_fit(panel, d.X, names=d.names, working="exchangeable")
    np.testing.assert_allclose(ms.gee[0].fit.beta, g.beta, rtol=1e-10)


def test_comparison_lrt_and_preferred(result):
    _, ms = result
    comp = ms.comparison
    # reference: AIC recomputed from loglik and n_params; preferred = argmin AIC (common practice)
    np.testing.assert_allclose(comp["aic"], -2 * comp["loglik"] + 2 * comp["n_params"], rtol=1e-12)
    assert ms.preferred == comp.loc[comp["aic"].idxmin(), "model"]
    (lrt,) = ms.lrts
    x = 2 * (comp["loglik"][1] - comp["loglik"][0])
    np.testing.assert_allclose(lrt.p, 0.5 * stats.chi2.sf(x, 1) + 0.5 * stats.chi2.sf(x, 2),
                               rtol=1e-10)  # reference: scipy chi2 mixture


def test_effect_and_json(result):
    _, ms = result
    ff = ms.fits[ms.preferred].fixed_frame().set_index("term")
    np.testing.assert_allclose(ms.effect.estimate, ff.loc["time × x", "estimate"], rtol=1e-12)
    assert ms.effect.statement.startswith("Each doubling of baseline marker")
    j = ms.to_json()
    text = json.dumps(j, allow_nan=False, ensure_ascii=False)  # JSON-safe: no NaN/inf left
    assert set(j) >= {"models", "comparison", "lrt", "gee", "effect", "mean_model"}
    assert [m["name"] for m in j["models"]] == ["intercept (REML)", "intercept+slope (REML)"]
    assert {"term", "estimate", "se", "robust_se"} <= set(j["models"][0]["fixed"][0])
    assert "time × x" in text and j["mean_model"]["confounders"] == ["sex"]


def test_failing_candidate_is_recorded_not_raised():
    c = _cohort(m=4, n_missing=0)  # too few subjects for a random slope (needs 5)
    ms = fit_candidates(c, structures=("intercept", "intercept+slope"), gee=())
    failed = [k for k in ms.candidates if k.fit is None]
    assert [k.name for k in failed] == ["intercept+slope (REML)"]
    assert "at least 5 subjects" in failed[0].error
    assert ms.to_json()["models"][1]["error"] == failed[0].error


def test_option_validation():
    c = _cohort(m=10)
    with pytest.raises(ModelError, match=r"unknown structure\(s\) \['slope'\]"):
        fit_candidates(c, structures=("slope",))
    with pytest.raises(ModelError, match="method == 'bayes'"):
        fit_candidates(c, method="bayes")
    assert model_name("intercept+serial", "reml", "gaussian") == "intercept+serial (gaussian, REML)"


def test_both_correlation_shapes_side_by_side():
    c = _cohort(m=50, seed=5, n_missing=0)
    ms = fit_candidates(c, structures=("intercept", "intercept+serial"), correlation="both",
                        gee=())
    names = [cand.name for cand in ms.candidates]
    assert names == ["intercept (REML)", "intercept+serial (exponential, REML)",
                     "intercept+serial (gaussian, REML)"]
    # reference: the engine called directly with each shape on the same data
    d = design(c.panel, c.baseline, MeanModel())
    for shape in ("exponential", "gaussian"):
        direct = fit_mixed(c.panel, d.X, names=d.names, structure="intercept+serial",
                           correlation=shape)
        mine = ms.fits[f"intercept+serial ({shape}, REML)"]
        np.testing.assert_allclose(mine.loglik, direct.loglik, rtol=1e-8)
    # the two shapes are not nested: only random intercept → each serial model is tested
    pairs = {(r.null, r.alt) for r in ms.lrts}
    assert pairs == {("intercept (REML)", "intercept+serial (exponential, REML)"),
                     ("intercept (REML)", "intercept+serial (gaussian, REML)")}
    assert len(ms.comparison) == 3
