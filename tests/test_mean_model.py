"""Mean-model design: columns vs pandas/patsy references, and the error messages."""
import numpy as np
import pandas as pd
import patsy
import pytest

from analysis.errors import ModelError
from analysis.models.mean_model import MeanModel, check_rank, complete_subjects, design
from analysis.preparation.panel import Panel
from analysis.splines import natural_spline_basis, spline_knots


def _cohort(m=30, seed=1):
    rng = np.random.default_rng(seed)
    counts = rng.integers(2, 6, m)
    subj = np.repeat(np.arange(m), counts)
    t = rng.uniform(0, 24, subj.size)
    panel = Panel.from_codes(subj, t, rng.normal(size=subj.size))
    centre = rng.choice(["Centre A", "Centre B", "Centre C"], m, p=[0.5, 0.3, 0.2])
    base = pd.DataFrame({"x": rng.normal(size=m), "age": rng.uniform(20, 70, m),
                         "centre": centre})
    return panel, base


def test_design_matches_pandas_dummies():
    panel, base = _cohort()
    d = design(panel, base, MeanModel(confounders=("age", "centre")))
    # reference: columns built by hand with pandas.get_dummies against the most frequent level
    long = base.iloc[panel.codes].reset_index(drop=True)
    ref_level = base["centre"].value_counts().idxmax()
    dummies = pd.get_dummies(long["centre"], dtype=float).drop(columns=ref_level)
    ref = pd.DataFrame({"intercept": 1.0, "time": panel.time, "x": long["x"],
                        "time × x": panel.time * long["x"], "age": long["age"]})
    for lv in dummies.columns:
        ref[f"centre: {lv} vs {ref_level}"] = dummies[lv]
    assert d.names == tuple(ref.columns)
    np.testing.assert_allclose(d.X, ref.to_numpy(float), rtol=0, atol=1e-12)
    assert d.interaction_term == "time × x" and d.names[d.interaction_index] == "time × x"
    assert d.reference_levels == {"centre": ref_level}


def test_design_matches_patsy_formula():
    panel, base = _cohort(seed=2)
    d = design(panel, base, MeanModel(confounders=("age",)))
    long = base.iloc[panel.codes].reset_index(drop=True).assign(time=panel.time)
    # reference: patsy's own design for the same formula
    ref = np.asarray(patsy.dmatrix("time + x + time:x + age", long))
    np.testing.assert_allclose(d.X, ref, rtol=1e-12, atol=1e-12)


def test_spline_spans_patsy_natural_cubic_space():
    rng = np.random.default_rng(3)
    t = np.sort(rng.uniform(0, 60, 200))
    knots = spline_knots(t, 4, rule="observations")
    basis = natural_spline_basis(t, knots)
    assert basis.shape == (200, 4)
    # reference: patsy cr() (natural cubic regression spline) with the same knots spans
    # the same space, constant included
    ref = np.asarray(patsy.dmatrix(
        f"cr(t, knots={list(knots[1:-1])}, lower_bound={knots[0]}, upper_bound={knots[-1]}) - 1",
        {"t": t}))
    mine = np.column_stack([np.ones_like(t), basis])
    assert np.linalg.matrix_rank(mine) == 5 and np.linalg.matrix_rank(ref) == 5
    joint = np.linalg.matrix_rank(np.column_stack([mine, ref]), tol=1e-8 * 200)
    assert joint == 5
    # the knots: quantiles of t (reference numpy)
    np.testing.assert_allclose(knots, np.quantile(t, np.linspace(0, 1, 5)), rtol=0, atol=1e-12)


def test_spline_model_keeps_linear_interaction():
    panel, base = _cohort(seed=4)
    d = design(panel, base, MeanModel(time_spline_df=3))
    assert d.time_terms == ("time (spline 1)", "time (spline 2)", "time (spline 3)")
    long_x = base["x"].to_numpy()[panel.codes]
    # reference: brute-force product of linear time and x
    np.testing.assert_allclose(d.X[:, d.interaction_index], panel.time * long_x, rtol=0, atol=1e-12)


def test_complete_subjects_matches_pandas_notna():
    panel, base = _cohort(seed=5)
    base = base.copy()
    base.loc[[1, 4], "x"] = np.nan
    base.loc[[4, 7], "centre"] = None
    keep = complete_subjects(base, MeanModel(confounders=("centre",)))
    ref = base[["x", "centre"]].notna().all(axis=1).to_numpy()  # reference: pandas notna
    np.testing.assert_array_equal(keep, ref)
    with pytest.raises(ModelError, match=r"'x' is missing for 2 of 30 subjects"):
        design(panel, base, MeanModel(confounders=("centre",)))


def test_errors_are_specific():
    panel, base = _cohort(seed=6)
    with pytest.raises(ModelError, match="'x' has no variation"):
        design(panel, base.assign(x=1.0), MeanModel())
    with pytest.raises(ModelError, match="'smoker' is not among the baseline covariates"):
        design(panel, base, MeanModel(confounders=("smoker",)))
    with pytest.raises(ModelError, match="'age' has no values for any included subject"):
        design(panel, base.assign(age=np.nan), MeanModel(confounders=("age",)))
    with pytest.raises(ModelError, match="single level"):
        design(panel, base.assign(centre="Centre A"), MeanModel(confounders=("centre",)))
    with pytest.raises(ModelError, match="needs both the time and the covariate"):
        MeanModel(time=False)
    with pytest.raises(ModelError, match="time_spline_df == 0, must be >= 1"):
        MeanModel(time_spline_df=0)


def test_collinear_columns_are_named():
    panel, base = _cohort(seed=7)
    base = base.assign(age_months=base["age"] * 12)
    with pytest.raises(ModelError, match=r"'age_months' is a linear combination of \['age'\]"):
        design(panel, base, MeanModel(confounders=("age", "age_months")))
    # reference: numpy matrix_rank agrees that the full-rank design passes
    X = design(panel, base, MeanModel(confounders=("age",))).X
    assert np.linalg.matrix_rank(X) == X.shape[1]
    check_rank(X, [f"c{j}" for j in range(X.shape[1])])


def test_describe_and_json_round_trip():
    m = MeanModel(confounders=("age", "centre"), time_spline_df=3)
    assert MeanModel.from_json(m.to_json()) == m
    text = m.describe("log2 marker")
    assert "natural cubic spline in time (3 df)" in text and "age, centre" in text
