"""The summary strip's numbers (analysis/output/overview.py) against brute-force pandas.

Reference: an independent pandas computation on the input table (groupby per subject: last
visit time, visit counts; value counts of the groups) in each test.
"""
from __future__ import annotations

import math
from types import SimpleNamespace

import numpy as np
import pandas as pd
import pytest

from analysis.models.effects import effect_steps
from analysis.output.overview import answer_overview, cohort_overview, last_visit_times
from analysis.preparation.demo import demo_roles, demo_settings, load_demo
from analysis.preparation.prepare import prepare
from analysis.settings import Roles, Settings


def _random_cohort(seed: int = 3) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    rows = []
    for s in range(60):
        k = int(rng.integers(1, 7))
        times = np.sort(rng.uniform(0, 40, size=k))
        x = rng.lognormal(1.0, 0.8) if s % 9 else np.nan
        for t in times:
            rows.append({"id": f"S{s:03d}", "t": t, "y": rng.normal(50, 5), "x": x})
    return pd.DataFrame(rows).sample(frac=1.0, random_state=seed)   # unsorted on purpose


def test_cohort_overview_matches_pandas_on_a_random_table():
    df = _random_cohort()
    roles = Roles(subject="id", time="t", response="y", covariates=("x",))
    settings = Settings(min_visits=2, time_max=35.0, require_covariate=False, n_strata=3,
                        transform="log2")
    ov = cohort_overview(prepare(df, roles, settings))
    # brute force: apply the window and the visit rule with pandas, then summarise
    kept = df[df["t"] <= 35.0]
    n = kept.groupby("id")["t"].transform("size")
    kept = kept[n >= 2]
    last = kept.groupby("id")["t"].max()
    assert ov.subjects == kept["id"].nunique()                   # pandas nunique
    assert ov.visits == len(kept)                                # pandas row count
    assert ov.followup_median == pytest.approx(float(last.median()))   # pandas median
    assert ov.followup_min == pytest.approx(float(last.min()))
    assert ov.followup_max == pytest.approx(float(last.max()))
    x = kept.groupby("id")["x"].first()
    assert ov.no_value == int(x.isna().sum())                    # pandas isna count
    assert sum(ov.group_sizes) + ov.no_value == ov.subjects
    # quantile groups of x: pandas qcut of the subjects with a value (3 groups of 3-quantiles)
    expected = pd.qcut(x.dropna(), 3).value_counts(sort=False).to_numpy()
    assert list(ov.group_sizes) == list(expected)
    assert ov.covariate == "x" and ov.covariate_label == "log2(x)" and ov.time_unit == "months"


def test_cohort_overview_of_the_demo_matches_pandas():
    df, roles, settings = load_demo(), demo_roles(), demo_settings()
    cohort = prepare(df, roles, settings)
    ov = cohort_overview(cohort)
    long = cohort.frame                                           # one row per analysed visit
    last = long.groupby("subject")["time"].max()                  # pandas groupby max
    assert (ov.subjects, ov.visits) == (long["subject"].nunique(), len(long))
    assert ov.followup_median == pytest.approx(float(last.median()))
    assert (ov.followup_min, ov.followup_max) == (pytest.approx(last.min()),
                                                  pytest.approx(last.max()))
    per_group = long.groupby("subject")["stratum_label"].first().value_counts()
    assert dict(zip(ov.group_labels, ov.group_sizes)) == per_group.to_dict()
    # the window is 0–60 months (sample_data/demo_settings.json): every last visit inside it
    assert 0 <= ov.followup_min <= ov.followup_max <= settings.time_max


def test_last_visit_times_of_an_empty_panel():
    from analysis.preparation.panel import Panel

    empty = Panel.from_codes(np.empty(0, np.int64), np.empty(0), np.empty(0))
    assert last_visit_times(empty).size == 0


def _stub_models(effect):
    return SimpleNamespace(effect=effect, preferred="intercept+slope", fits={"a": 1, "b": 2})


def test_answer_overview_reads_the_effect_and_the_preferred_structure():
    effect = SimpleNamespace(estimate=-0.044, lo=-0.057, hi=-0.031, transform="log2",
                             statement="Each doubling …", model="intercept+slope")
    ans = answer_overview(_stub_models(effect))
    # the step words come from analysis.models.effects.effect_steps (the statement's own rule)
    assert ans.step == effect_steps(-0.044, -0.057, -0.031, transform="log2")[0].step
    assert (ans.estimate, ans.lo, ans.hi) == (effect.estimate, effect.lo, effect.hi)
    assert ans.preferred == "intercept+slope" and ans.fitted == 2 and ans.has_effect
    assert ans.statement == effect.statement


def test_answer_overview_without_an_effect():
    ans = answer_overview(_stub_models(None))
    assert not ans.has_effect and math.isnan(ans.estimate) and ans.statement == ""
    assert ans.to_json()["estimate"] is None                      # NaN → null in JSON
