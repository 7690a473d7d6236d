"""Strata cutting, transforms and centring.

References: numpy (np.linspace, np.quantile, np.log*), pandas (pd.qcut, pd.cut,
Series.median/mean) and brute-force interval membership written in the tests.
"""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from analysis.errors import DataError, SettingsError
from analysis.preparation.strata import (
    MISSING_LABEL,
    categorical_strata,
    center_values,
    cut_strata,
    transform_values,
)


def brute_codes(values, edges):
    """Independent membership: left-closed intervals, the last one closed (loop per value)."""
    k = len(edges) - 1
    out = []
    for v in values:
        if np.isnan(v):
            out.append(-1)
            continue
        for j in range(k):
            last = j == k - 1
            if edges[j] <= v < edges[j + 1] or (last and edges[j] <= v <= edges[j + 1]):
                out.append(j)
                break
    return np.array(out)


def test_equal_width_edges_match_linspace():
    rng = np.random.default_rng(3)
    v = rng.normal(50, 12, 300)
    v[[4, 77]] = np.nan
    s = cut_strata(v, method="equal-width", n=5, name="acr", unit_label="mg/g")
    ok = v[~np.isnan(v)]
    # reference: numpy linspace between the observed extremes
    np.testing.assert_allclose(s.edges, np.linspace(ok.min(), ok.max(), 6), rtol=0, atol=1e-12)
    # reference: brute-force interval membership
    np.testing.assert_array_equal(s.codes, brute_codes(v, s.edges))
    # reference: pandas value counts of the same codes
    frame = s.to_frame()
    counts = pd.Series(s.codes[s.codes >= 0]).value_counts().reindex(range(5), fill_value=0)
    np.testing.assert_array_equal(frame["subjects"].to_numpy()[:5], counts.to_numpy())
    assert list(frame.columns) == ["stratum", "label", "lo", "hi", "subjects"]
    assert frame.iloc[-1]["stratum"] == -1 and frame.iloc[-1]["label"] == MISSING_LABEL
    assert frame.iloc[-1]["subjects"] == 2
    assert all(lab.endswith(" mg/g") for lab in s.labels)


@pytest.mark.parametrize("transform,fn,inv", [("log2", np.log2, np.exp2),
                                               ("log", np.log, np.exp),
                                               ("log10", np.log10, lambda a: 10.0 ** a)])
def test_equal_width_on_a_log_scale_has_equal_log_widths(transform, fn, inv):
    rng = np.random.default_rng(5)
    v = rng.lognormal(2.0, 1.0, 400)
    v[[3, 9]] = np.nan
    s = cut_strata(v, method="equal-width", n=4, name="acr", unit_label="mg/g",
                   transform=transform)
    ok = v[~np.isnan(v)]
    # reference: numpy linspace on np.log2 (etc.) of the values, computed here independently
    ref = np.linspace(fn(ok).min(), fn(ok).max(), 5)
    np.testing.assert_allclose(fn(s.edges), ref, rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(np.diff(fn(s.edges)), np.diff(ref)[0], rtol=1e-9)
    # edges in the covariate's own units: the ends are the observed extremes
    assert s.edges[0] == ok.min() and s.edges[-1] == ok.max()
    np.testing.assert_allclose(s.edges, inv(ref), rtol=1e-12)
    # reference: brute-force membership of the log values in the log-scale intervals
    np.testing.assert_array_equal(s.codes, brute_codes(fn(v), ref))
    # labels print the range in mg/g (the raw extremes), not in log units
    lo_text = s.labels[0].split(" – ")[0]
    assert float(lo_text) == pytest.approx(ok.min(), rel=0.05)
    assert s.labels[-1].endswith(" mg/g")
    # raw-scale cut differs (reference: numpy linspace on the raw values)
    raw = cut_strata(v, method="equal-width", n=4, name="acr")
    np.testing.assert_allclose(raw.edges, np.linspace(ok.min(), ok.max(), 5), rtol=1e-12)
    assert not np.array_equal(raw.codes, s.codes)


def test_transform_leaves_quantile_and_custom_strata_unchanged():
    # reference: the untransformed cut of the same values (a monotone transform keeps the
    # order, and custom breaks are given in the covariate's own units)
    rng = np.random.default_rng(6)
    v = rng.lognormal(1.0, 0.7, 200)
    for method, kw in (("quantile", {"n": 4}), ("custom", {"breaks": (2.0, 4.0)})):
        a = cut_strata(v, method=method, name="x", **kw)
        b = cut_strata(v, method=method, name="x", transform="log2", **kw)
        np.testing.assert_array_equal(a.codes, b.codes)
        np.testing.assert_array_equal(a.edges, b.edges)
        assert a.labels == b.labels
    with pytest.raises(SettingsError, match="transform == 'sqrt'"):
        cut_strata(v, method="quantile", transform="sqrt")


def test_quantile_edges_and_codes_match_numpy_and_qcut():
    rng = np.random.default_rng(5)
    v = rng.lognormal(2.0, 0.7, 102)  # (102-1)*j/4 not an integer: no edge equals a data value
    s = cut_strata(v, method="quantile", n=4)
    # reference: numpy quantile (linear interpolation) at 0, .25, .5, .75, 1
    np.testing.assert_allclose(s.edges, np.quantile(v, np.linspace(0, 1, 5)), rtol=1e-14, atol=0)
    # reference: pandas qcut (right-closed) agrees when no value sits on an inner edge
    ref = pd.qcut(v, 4, labels=False)
    np.testing.assert_array_equal(s.codes, ref)
    assert s.notes == ()


def test_quantile_ties_collapse_edges_with_note():
    v = np.array([1.0] * 6 + [2.0, 3.0, 4.0, 5.0])
    s = cut_strata(v, method="quantile", n=4, name="score")
    # reference: numpy unique of numpy quantile edges
    expect = np.unique(np.quantile(v, np.linspace(0, 1, 5)))
    np.testing.assert_allclose(s.edges, expect, rtol=0, atol=1e-12)
    assert len(s.labels) == expect.size - 1 < 4
    assert any("score" in n and "tied" in n for n in s.notes)
    # reference: pandas qcut with duplicates="drop" gives the same edges
    _, bins = pd.qcut(v, 4, retbins=True, duplicates="drop")
    np.testing.assert_allclose(s.edges, bins, rtol=0, atol=1e-12)
    np.testing.assert_array_equal(s.codes, brute_codes(v, s.edges))


def test_values_on_edges_follow_left_closed_convention():
    v = np.array([0.0, 1.0, 2.0, 3.0, 4.0])
    s = cut_strata(v, method="custom", breaks=(1.0, 3.0))
    # reference: brute-force membership; 1.0 and 3.0 start new strata, 4.0 (max) is in the last
    np.testing.assert_array_equal(s.codes, brute_codes(v, np.array([0.0, 1.0, 3.0, 4.0])))
    np.testing.assert_array_equal(s.codes, [0, 1, 1, 2, 2])


def test_custom_break_outside_range_is_named():
    v = np.array([2.0, 5.0, 9.5])
    with pytest.raises(SettingsError, match=r"break 12 is outside the range of 'marker' \(2 to 9\.5\)"):
        cut_strata(v, method="custom", breaks=(4.0, 12.0), name="marker")
    with pytest.raises(SettingsError, match="break 2 is outside"):
        cut_strata(v, method="custom", breaks=(2.0,), name="marker")
    with pytest.raises(SettingsError, match="strictly increasing"):
        cut_strata(v, method="custom", breaks=(6.0, 4.0), name="marker")


def test_bad_options_and_empty_column():
    with pytest.raises(SettingsError, match="strata_method == 'thirds'"):
        cut_strata([1.0, 2.0], method="thirds")
    with pytest.raises(SettingsError, match="n_strata == 0"):
        cut_strata([1.0, 2.0], method="quantile", n=0)
    with pytest.raises(DataError, match="'acr' has no values") as err:
        cut_strata([np.nan, np.nan], method="quantile", name="acr")
    assert err.value.column == "acr"


def test_single_value_gives_one_stratum():
    s = cut_strata(np.array([3.0, 3.0, np.nan]), method="equal-width", n=4, name="x")
    np.testing.assert_array_equal(s.codes, [0, 0, -1])
    assert len(s.labels) == 1 and s.notes


def test_labels_are_compact_and_distinct():
    s = cut_strata(np.array([-3.3, 0.0, 2.25, 3.0]), method="equal-width", n=3)
    assert s.labels == ("−3.3 – −1.2", "−1.2 – 0.9", "0.9 – 3.0")
    big = cut_strata(np.array([0.0, 12_345.0, 30_000.0]), method="equal-width", n=3)
    assert big.labels[0] == "0 – 10,000"
    assert len(set(big.labels)) == 3


@settings(max_examples=60, deadline=None)
@given(st.lists(st.floats(-1e3, 1e3, allow_nan=False), min_size=2, max_size=40),
       st.integers(1, 6), st.sampled_from(["equal-width", "quantile"]))
def test_every_value_in_exactly_its_interval(values, n, method):
    v = np.asarray(values)
    s = cut_strata(v, method=method, n=n)
    # reference: brute-force membership against the reported edges
    np.testing.assert_array_equal(s.codes, brute_codes(v, s.edges))
    assert len(s.labels) == s.edges.size - 1 >= 1
    assert len(set(s.labels)) == len(s.labels)


def test_categorical_levels_sorted_and_category_order():
    v = np.array(["tacrolimus", "ciclosporin", None, "tacrolimus", np.nan, ""], dtype=object)
    s = categorical_strata(v, name="drug")
    assert s.labels == ("ciclosporin", "tacrolimus")  # reference: Python sorted()
    np.testing.assert_array_equal(s.codes, [1, 0, -1, 1, -1, -1])
    assert s.edges is None and s.kind == "categorical"
    cat = pd.Categorical(["low", "high", "mid", None], categories=["low", "mid", "high"])
    c = categorical_strata(cat, name="band")
    assert c.labels == ("low", "mid", "high")
    # reference: pandas' own category codes (missing = -1)
    np.testing.assert_array_equal(c.codes, cat.codes)
    frame = c.to_frame()
    assert frame["lo"].isna().all() and frame.iloc[-1]["label"] == MISSING_LABEL


@pytest.mark.parametrize("transform,fn", [("log", np.log), ("log2", np.log2),
                                          ("log10", np.log10), ("none", lambda x: x)])
def test_transforms_match_numpy(transform, fn):
    x = np.array([0.5, 3.0, np.nan, 120.0])
    # reference: numpy ufuncs
    np.testing.assert_allclose(transform_values(x, transform), fn(x), rtol=1e-15, equal_nan=True)


def test_log_of_nonpositive_values_is_explained():
    x = np.array([4.0, 0.0, -2.5, np.nan, 7.0])
    with pytest.raises(DataError, match=r"'acr': log10 transform needs values > 0, but 2 values "
                                        r"are <= 0 \(smallest −2\.5\)") as err:
        transform_values(x, "log10", name="acr")
    assert err.value.column == "acr"
    with pytest.raises(SettingsError, match="transform == 'sqrt'"):
        transform_values(x, "sqrt")


def test_centring_matches_pandas():
    x = np.array([1.0, 2.0, np.nan, 10.0])
    s = pd.Series(x)
    # reference: pandas mean/median skip NaN
    c, v = center_values(x, "mean")
    assert v == pytest.approx(s.mean(), rel=1e-15)
    np.testing.assert_allclose(c, x - s.mean(), rtol=1e-15, equal_nan=True)
    c, v = center_values(x, "median")
    assert v == pytest.approx(s.median(), rel=1e-15)
    c, v = center_values(x, 5)
    assert v == 5.0
    np.testing.assert_allclose(c, x - 5.0, rtol=0, atol=0, equal_nan=True)
    c, v = center_values(x, "none")
    assert v == 0.0
    with pytest.raises(SettingsError, match="center == 'mode'"):
        center_values(x, "mode")
    with pytest.raises(DataError, match="no values"):
        center_values(np.array([np.nan]), "median", name="acr")


# -- small groups (thresholds are common practice: under 10 subjects or under 5% of the cohort)
def test_small_categorical_levels_are_flagged():
    v = np.array(["A"] * 230 + ["B"] * 7 + ["C"] * 12 + [None] * 1, dtype=object)
    s = categorical_strata(v, name="centre")
    # reference: pandas value_counts of the same levels; B has 7 < 10, C has 12 of 250 = 4.8% < 5%
    counts = pd.Series(v).value_counts()
    assert counts["B"] < 10 and counts["C"] / len(v) < 0.05 and counts["A"] >= 10
    small = [n for n in s.notes if "has only" in n]
    assert len(small) == 2
    assert small[0].startswith(f"group B of 'centre' has only {counts['B']} subjects")
    assert small[1].startswith(f"group C of 'centre' has only {counts['C']} subjects")
    assert f"{100 * counts['C'] / len(v):.3g}% of {len(v)}" in small[1]


def test_groups_at_the_thresholds_are_not_flagged():
    # 10 subjects of 200 is exactly 5%: neither under 10 nor under 5% (hand count)
    v = np.array(["A"] * 190 + ["B"] * 10, dtype=object)
    assert categorical_strata(v, name="g").notes == ()
    # a single group (no split) is never flagged, however small
    assert cut_strata(np.array([1.0, 1.0, 1.0]), method="quantile", n=2).notes[-1].endswith(
        "one stratum")
    assert not any("has only" in n for n in
                   categorical_strata(np.array(["A"] * 3, dtype=object), name="g").notes)


def test_small_numeric_group_is_flagged_and_empty_group_keeps_its_own_note():
    rng = np.random.default_rng(8)
    v = np.r_[rng.uniform(0, 10, 60), 40.0]          # one outlier alone in the top group
    s = cut_strata(v, method="equal-width", n=4, name="acr")
    # reference: numpy histogram over the reported edges (brute count per group)
    counts = np.histogram(v, bins=s.edges)[0]
    assert counts[-1] == 1 and counts[1] == counts[2] == 0
    small = [n for n in s.notes if "has only" in n]
    assert len(small) == 1 and small[0].startswith(f"group {s.labels[-1]} of 'acr' has only 1 subject ")
    assert sum("has no subjects" in n for n in s.notes) == 2
