"""Loss to follow-up told apart from the end of the data.

References: statsmodels ``SurvfuncRight`` (Kaplan–Meier survival and its Greenwood standard
error) with the log(−log) interval written out here (Kalbfleisch & Prentice, §1.4);
pandas/numpy brute force per subject for the statuses and potential follow-up; and the demo
generator's own record of why each recipient's visits end (sample_data/kidney_registry_truth.csv).
"""
from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
from scipy.stats import norm
from statsmodels.duration.survfunc import SurvfuncRight

from analysis.preparation.demo import DEMO_CSV, demo_roles, demo_settings, load_demo
from analysis.errors import DataError, SettingsError
from analysis.preparation.panel import Panel
from analysis.pipeline import explore
from analysis.preparation.prepare import select_cohort
from analysis.settings import Roles, Settings
from analysis.preparation.strata import cut_strata
from analysis.exploration.summaries import (CENSORED_STATUS, COMPLETE_STATUS, LEFT_EARLY_STATUS, OVERDUE_GAPS,
                                cohort_dropout, dropout_summary, retention_curve)

TRUTH_CSV = DEMO_CSV.with_name("kidney_registry_truth.csv")


def _sm_band(sf: SurvfuncRight, z: float):
    """log(−log) 95% interval from statsmodels' survival and Greenwood SE (formula written out)."""
    s, se = sf.surv_prob, sf.surv_prob_se
    with np.errstate(divide="ignore", invalid="ignore"):
        theta = np.log(-np.log(s))
        se_theta = se / (s * np.abs(np.log(s)))
        return np.exp(-np.exp(theta + z * se_theta)), np.exp(-np.exp(theta - z * se_theta))


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_retention_curve_matches_statsmodels(seed):
    rng = np.random.default_rng(seed)
    n = 300
    # rounded times give ties between leavers and censored subjects
    time = np.round(rng.exponential(30.0, n), 0) + 1.0
    left = rng.random(n) < 0.4
    got = retention_curve(time, left)
    # reference: statsmodels Kaplan–Meier at the times with events
    sf = SurvfuncRight(time, left.astype(float))
    ev = got[got["left"] > 0]
    np.testing.assert_allclose(ev["time"], sf.surv_times, rtol=0, atol=0)
    np.testing.assert_allclose(ev["retained"], sf.surv_prob, rtol=1e-12, atol=1e-12)
    np.testing.assert_array_equal(ev["at_risk"], sf.n_risk)
    np.testing.assert_array_equal(ev["left"], sf.n_events)
    lo, hi = _sm_band(sf, norm.ppf(0.975))
    ok = np.isfinite(lo)
    np.testing.assert_allclose(ev["lo"].to_numpy()[ok], lo[ok], rtol=1e-10, atol=1e-12)
    np.testing.assert_allclose(ev["hi"].to_numpy()[ok], hi[ok], rtol=1e-10, atol=1e-12)
    # first row: everyone retained at time 0; last row: the largest time (censored there)
    assert got.iloc[0][["time", "retained", "lo", "hi"]].tolist() == [0.0, 1.0, 1.0, 1.0]
    assert got["time"].iloc[-1] == time.max()
    assert (got["lo"] <= got["retained"] + 1e-15).all() and (got["retained"] <= got["hi"] + 1e-15).all()


def test_retention_without_censoring_is_the_share_still_seen():
    # brute force: with every time an event the curve is 1 − ECDF (share with time > t)
    t = np.array([3.0, 1.0, 4.0, 1.0, 5.0, 9.0, 2.0, 6.0])
    got = retention_curve(t, np.ones(t.size, bool))
    for tv, s in zip(got["time"].iloc[1:], got["retained"].iloc[1:]):
        assert s == pytest.approx(np.mean(t > tv), abs=1e-15)


def _panel(seed=0, m=200):
    rng = np.random.default_rng(seed)
    k = rng.integers(2, 10, m)
    subj = np.repeat(np.arange(m), k)
    t = np.concatenate([np.sort(rng.uniform(0, 60, kk)) for kk in k])
    y = 50 - 0.2 * t + rng.normal(0, 3, subj.size)
    return Panel.from_arrays(subj, t, y), rng


def test_statuses_follow_the_stated_rule_brute_force():
    panel, rng = _panel()
    m = panel.n_subjects
    pot = rng.uniform(10, 80, m)
    cov = rng.normal(size=m)
    strata = cut_strata(cov, method="quantile", n=3)
    ids = np.array([f"S{i:03d}" for i in range(m)])
    d = dropout_summary(panel, strata, horizon=50.0, subject_ids=ids, potential_followup=pot,
                        followup_source="test")
    # reference: pandas per-subject last visit, median within-subject gap, the rule in words
    long = pd.DataFrame({"s": panel.codes, "t": panel.time})
    last = long.groupby("s")["t"].max().to_numpy()
    gap = np.median(long.groupby("s")["t"].diff().dropna())
    p = np.maximum(pot, last)
    want = []
    for i in range(m):  # a test may loop over subjects
        if last[i] < min(50.0, p[i]) - OVERDUE_GAPS * gap:
            want.append(LEFT_EARLY_STATUS)
        elif p[i] < 50.0:
            want.append(CENSORED_STATUS)
        else:
            want.append(COMPLETE_STATUS)
    assert d.typical_gap == pytest.approx(gap, rel=1e-14)
    assert d.subjects["status"].tolist() == want
    assert d.subjects["subject"].tolist() == ids.tolist()
    assert d.counts == {s: want.count(s) for s in (LEFT_EARLY_STATUS, CENSORED_STATUS,
                                                   COMPLETE_STATUS)}
    all_row = d.count_table[d.count_table["stratum"] == -2].iloc[0]
    assert all_row[LEFT_EARLY_STATUS] == want.count(LEFT_EARLY_STATUS)
    assert f"{OVERDUE_GAPS:g} typical gaps" in d.status_rule and "median" in d.status_rule
    # the overall retention curve is Kaplan–Meier on (leaving at the last visit, else censored at
    # min(potential, horizon)); reference statsmodels
    left = np.array(want) == LEFT_EARLY_STATUS
    time = np.where(left, last, np.minimum(p, 50.0))
    sf = SurvfuncRight(time, left.astype(float))
    ov = d.retention[(d.retention["stratum"] == -2) & (d.retention["left"] > 0)]
    np.testing.assert_allclose(ov["retained"], sf.surv_prob, rtol=1e-12)
    out = d.to_json()
    json.dumps(out, allow_nan=False)
    assert set(out["retention"][0]) >= {"stratum", "time", "retained", "lo", "hi"}
    assert set(out["subjects"][0]) >= {"subject", "status", "last_time", "potential_followup"}


def test_without_potential_followup_only_last_visits_are_shown():
    panel, _ = _panel(1, 80)
    strata = cut_strata(np.arange(80.0), method="quantile", n=2)
    d = dropout_summary(panel, strata)
    assert not d.classified and d.counts == {} and d.subjects["status"].isna().all()
    assert "cannot be told apart" in d.sentence("months")
    last = pd.DataFrame({"s": panel.codes, "t": panel.time}).groupby("s")["t"].max().to_numpy()
    ov = d.retention[d.retention["stratum"] == -2]
    # brute force: the share with a last visit after each time
    for tv, s in zip(ov["time"].iloc[1:], ov["retained"].iloc[1:]):
        assert s == pytest.approx(np.mean(last > tv))


# ------------------------------------------------------------------ the demo registry
@pytest.fixture(scope="module")
def demo_ex():
    return explore(load_demo(), demo_roles(), demo_settings())


def test_demo_statuses_agree_with_the_generators_truth(demo_ex):
    d = demo_ex.summaries.dropout
    s = d.subjects
    # reference: the generator's record (left = dropout or loss removed planned visits;
    # planned_months = min(60 months, data cut) since transplant)
    truth = pd.read_csv(TRUTH_CSV).set_index("recipient_id").loc[s["subject"]]
    h = d.horizon
    want = np.where((truth["left"].to_numpy() == 1) & (s["last_time"].to_numpy() < h),
                    LEFT_EARLY_STATUS,
                    np.where(truth["planned_months"].to_numpy() < h, CENSORED_STATUS,
                             COMPLETE_STATUS))
    agree = np.mean(want == s["status"].to_numpy())
    assert agree >= 0.95, agree
    # potential follow-up: transplant to the data cut (2023-06-30, the latest visit date),
    # capped at the window's 60 months; the truth file's planned months agree to 0.01 (2 dp in
    # the file, and the generator rounds 60 months down to a whole day, 59.99)
    np.testing.assert_allclose(s["potential_followup"], truth["planned_months"], atol=0.0101)
    # most subjects who had not reached the horizon were cut off, not lost
    assert d.counts[CENSORED_STATUS] > d.counts[LEFT_EARLY_STATUS]


def test_demo_data_cut_setting_and_potential_followup(demo_ex):
    df = load_demo()
    s = demo_settings().replace(data_cut="2022-12-31")
    sel = select_cohort(df, demo_roles(), s)
    pot, source, _ = sel.followup.potential(data_cut=s.data_cut, time_max=s.time_max)
    # reference: pandas date arithmetic, transplant date to the cut, in months of 30.4375 days
    tx = pd.to_datetime(df.groupby("recipient_id")["tx_date"].first().loc[sel.subject_ids])
    want = np.minimum((pd.Timestamp("2022-12-31") - tx).dt.days.to_numpy() / 30.4375, 60.0)
    np.testing.assert_allclose(pot, want, rtol=1e-12)
    assert "2022-12-31" in source
    d = cohort_dropout(demo_ex.cohort, data_cut="2022-12-31")
    assert "2022-12-31" in d.sentence("months")
    assert any("after the end of their potential follow-up" in n for n in d.notes)


def test_followup_end_role_with_numbers():
    # three subjects, numeric time since origin; subject B's follow-up ended at 10
    df = pd.DataFrame({"id": ["A"] * 3 + ["B"] * 3 + ["C"] * 3,
                       "t": [0, 5, 10, 0, 5, 9, 0, 2, 4],
                       "y": np.arange(9.0),
                       "end": [30] * 3 + [10] * 3 + [30] * 3})
    roles = Roles(subject="id", time="t", response="y", followup_end="end")
    sel = select_cohort(df, roles, Settings(min_visits=2))
    pot, source, _ = sel.followup.potential()
    np.testing.assert_array_equal(pot, [30.0, 10.0, 30.0])
    assert "'end'" in source
    # without the role: nothing to tell leaving from the end of the data
    sel2 = select_cohort(df, Roles(subject="id", time="t", response="y"), Settings(min_visits=2))
    assert sel2.followup.potential()[0] is None


BAD = [
    ({"end": [30] * 3 + [10, 11, 10] + [30] * 3}, "must be the same on every row.*rows 5, 6, 7"),
    ({"end": [30] * 3 + [None] * 3 + [30] * 3}, "empty for 1 subject"),
    ({"end": ["x"] + [30] * 8}, "must hold numbers"),
]


@pytest.mark.parametrize("change,pattern", BAD)
def test_bad_followup_end_is_explained(change, pattern):
    df = pd.DataFrame({"id": ["A"] * 3 + ["B"] * 3 + ["C"] * 3,
                       "t": [0, 5, 10, 0, 5, 9, 0, 2, 4], "y": np.arange(9.0), **change})
    roles = Roles(subject="id", time="t", response="y", followup_end="end")
    with pytest.raises(DataError, match=pattern) as err:
        select_cohort(df, roles, Settings(min_visits=2))
    assert err.value.column == "end"


@pytest.mark.parametrize("value", ["30/06/2024", "2024-13-01", "soon", 20240630])
def test_bad_data_cut_is_explained(value):
    with pytest.raises(SettingsError, match="data_cut .* YYYY-MM-DD"):
        Settings(data_cut=value)
