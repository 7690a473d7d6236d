"""Ill-posed input gives a ModelError naming the problem; result tables have the documented shape."""
from __future__ import annotations

import json

import numpy as np
import pytest
from scipy import stats

from analysis.errors import ModelError
from analysis.models.mixed import STRUCTURES, fit_mixed
from analysis.models.mixed.simulate import simulate_cohort
from analysis.preparation.panel import Panel


@pytest.fixture(scope="module")
def sim():
    return simulate_cohort(40, seed=3)


def test_rows_must_match(sim):
    with pytest.raises(ModelError, match=r"design matrix has \d+ rows but the panel has"):
        fit_mixed(sim.panel, sim.X[:-1], names=sim.names)


def test_nan_in_design_names_column(sim):
    X = sim.X.copy()
    X[5, 2] = np.nan
    with pytest.raises(ModelError, match=r"\['x'\].*panel row"):
        fit_mixed(sim.panel, X, names=sim.names)


def test_nan_in_response(sim):
    y = sim.panel.y.copy()
    y[[3, 9]] = np.nan
    with pytest.raises(ModelError, match="response is missing.*2 panel row"):
        fit_mixed(sim.panel.with_y(y), sim.X, names=sim.names)


def test_constant_column_is_named(sim):
    X = np.column_stack([sim.X, np.zeros(sim.panel.n_obs)])
    with pytest.raises(ModelError, match="'dose' has no variation"):
        fit_mixed(sim.panel, X, names=(*sim.names, "dose"))


def test_collinear_columns_are_named(sim):
    X = np.column_stack([sim.X, 2 * sim.X[:, 1] - sim.X[:, 2]])
    with pytest.raises(ModelError, match=r"singular \(rank 4 of 5\): column\(s\) \['\w+'\] are linear"):
        fit_mixed(sim.panel, X, names=(*sim.names, "combo"))


def test_too_few_subjects():
    p = Panel.from_arrays(np.array([1, 1, 2, 2]), np.array([0.0, 1.0, 0.0, 2.0]),
                          np.array([1.0, 2.0, 2.5, 3.0]))
    X = np.column_stack([np.ones(4), p.time])
    with pytest.raises(ModelError, match="at least 5 subjects.*have 2"):
        fit_mixed(p, X, names=("a", "b"), structure="intercept+slope")


def test_random_slope_needs_distinct_times():
    p = Panel.from_arrays(np.repeat(np.arange(6), 2), np.repeat(np.arange(6.0), 2),
                          np.arange(12.0) % 5)
    X = np.column_stack([np.ones(12), p.time])
    with pytest.raises(ModelError, match="2 or more distinct visit times"):
        fit_mixed(p, X, names=("a", "b"), structure="intercept+slope")


def test_single_visits_cannot_separate_components():
    p = Panel.from_arrays(np.arange(8), np.arange(8.0), np.sin(np.arange(8.0)))
    X = np.column_stack([np.ones(8), p.time])
    with pytest.raises(ModelError, match="2 or more visits"):
        fit_mixed(p, X, names=("a", "b"), structure="intercept")


@pytest.mark.parametrize("kw,msg", [({"structure": "ar1"}, "structure 'ar1' is not known"),
                                    ({"correlation": "linear"}, "correlation 'linear'"),
                                    ({"method": "gls"}, "method 'gls'"),
                                    ({"maxiter": 0}, "maxiter == 0, must be >= 1"),
                                    ({"start": {"range": 1.0}}, "do not belong"),
                                    ({"start": {"error_var": -1.0}}, "must be > 0")])
def test_bad_options(sim, kw, msg):
    with pytest.raises(ModelError, match=msg):
        fit_mixed(sim.panel, sim.X, names=sim.names, **kw)


def test_names_length(sim):
    with pytest.raises(ModelError, match="3 term names given for 4"):
        fit_mixed(sim.panel, sim.X, names=sim.names[:3])


@pytest.mark.parametrize("structure", STRUCTURES)
def test_tables_and_json(sim, structure):
    fit = fit_mixed(sim.panel, sim.X, names=sim.names, structure=structure)
    ff = fit.fixed_frame()
    assert list(ff.columns) == ["term", "estimate", "se", "robust_se", "df", "robust_df", "lo",
                                "hi", "robust_lo", "robust_hi", "z", "p", "robust_z", "robust_p"]
    # reference library scipy.stats: t quantile and tail (Satterthwaite df; robust: subjects − p)
    np.testing.assert_allclose(ff["hi"] - ff["estimate"], stats.t.ppf(0.975, ff["df"]) * ff["se"],
                               rtol=1e-12)
    rdf = sim.panel.n_subjects - 4
    assert (ff["robust_df"] == rdf).all()
    np.testing.assert_allclose(ff["robust_p"], 2 * stats.t.sf(np.abs(ff["estimate"] /
                                                                     ff["robust_se"]), rdf),
                               rtol=1e-12)
    vf = fit.variance_frame()
    assert list(vf["parameter"]) == list(fit.variance)
    d = json.loads(json.dumps(fit.to_json()))
    assert d["structure"] == structure and len(d["fixed"]) == 4
    assert d["n_params"] == 4 + len(fit.variance)
    assert (fit.correlation is None) == ("serial" not in structure)
