"""Count settings have upper limits checked before anything is allocated; each message names
the setting and its allowed range and carries the field for the page.

References: the limits table ``analysis.settings.COUNT_LIMITS`` (a design choice, documented in
the README) and, for the data-derived limits, the subject and distinct-time counts computed in
the test with numpy/pandas.
"""
from __future__ import annotations

import tracemalloc

import numpy as np
import pytest

from analysis.preparation.demo import demo_roles, demo_settings, load_demo
from analysis.errors import SettingsError
from analysis.preparation.loading import Dataset
from analysis.pipeline import Workbench
from analysis.settings import COUNT_LIMITS, Settings


@pytest.mark.parametrize("field", sorted(COUNT_LIMITS))
@pytest.mark.parametrize("value", [0, "over", 2_000_000_000])
def test_count_settings_outside_their_range_name_field_and_range(field, value):
    hi = COUNT_LIMITS[field]
    value = hi + 1 if value == "over" else value
    with pytest.raises(SettingsError) as info:
        Settings(**{field: value})
    assert info.value.field == field
    assert field in str(info.value) and f"from 1 to {hi}" in str(info.value)


@pytest.mark.parametrize("field", sorted(COUNT_LIMITS))
def test_the_ceiling_itself_is_allowed(field):
    assert getattr(Settings(**{field: COUNT_LIMITS[field]}), field) == COUNT_LIMITS[field]


def test_huge_requests_fail_without_allocating():
    tracemalloc.start()
    for field in COUNT_LIMITS:
        with pytest.raises(SettingsError):
            Settings.from_dict({field: 1_000_000_000})
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    assert peak < 5_000_000      # bytes; the old behaviour allocated gigabytes


def test_too_many_break_points_is_a_message():
    with pytest.raises(SettingsError) as info:
        Settings(strata_method="custom", breaks=tuple(range(COUNT_LIMITS["n_strata"])))
    assert info.value.field == "breaks"


@pytest.fixture(scope="module")
def small():
    df = load_demo()
    keep = df["recipient_id"].unique()[:12]
    return df[df["recipient_id"].isin(keep)].reset_index(drop=True)


def test_more_groups_than_subjects_is_a_message(small):
    wb = Workbench()
    s = demo_settings().replace(n_strata=40, min_visits=1)
    n = wb.selection(Dataset.from_frame(small), demo_roles(), s).panel.n_subjects
    assert n < 40     # reference: the subject count of the cohort itself
    with pytest.raises(SettingsError) as info:
        wb.cohort(Dataset.from_frame(small), demo_roles(), s)
    assert info.value.field == "n_strata" and f"from 1 to {n}" in str(info.value)


def test_spline_df_above_the_distinct_times_is_reduced_and_said(small):
    wb = Workbench()
    # three visit times per subject only: fewer distinct times than the spline asks for
    df = small.copy()
    df["months_since_tx"] = np.tile([0.0, 6.0, 12.0], len(df) // 3 + 1)[:len(df)]
    roles = demo_roles()
    s = demo_settings().replace(origin="as-is", spline_df=5, min_visits=1, time_min=None,
                                duplicates="average",
                                time_max=None)
    roles = type(roles)(**{**roles.to_dict(), "time": "months_since_tx", "event_date": None,
                           "covariates": tuple(roles.covariates)})
    ds = Dataset.from_frame(df)
    times = np.unique(wb.selection(ds, roles, s).panel.time).size   # reference: numpy
    assert times <= 5
    res = wb.residuals(ds, roles, s)
    # the default-sized spline still runs on sparse schedules, with fewer df, and says so
    # where the residual method is reported (summarize JSON, report, page)
    assert f"only {times} distinct times" in res.description
    assert f"with {times - 1} df" in res.description
    assert any(f"{times} distinct times" in n for n in res.notes)
