"""Role columns are parsed once per (data, roles): a settings change re-runs the inclusion rules
on parsed arrays, with the same result and the same messages as a fresh parse.

Reference: ``analysis.preparation.prepare.select_cohort`` called directly on the table (no cache), and a
brute-force count of the parse calls in the test.
"""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

import analysis.preparation.prepare as prepare
from analysis.preparation.demo import demo_roles, demo_settings, load_demo
from analysis.errors import DataError
from analysis.preparation.loading import Dataset
from analysis.pipeline import Workbench


def test_settings_changes_parse_each_column_once(monkeypatch):
    calls = {"dates": 0, "codes": 0}
    real_dates, real_codes = prepare.read_dates, prepare._subject_codes

    def dates(*a, **k):
        calls["dates"] += 1
        return real_dates(*a, **k)

    def codes(*a, **k):
        calls["codes"] += 1
        return real_codes(*a, **k)

    monkeypatch.setattr(prepare, "read_dates", dates)
    monkeypatch.setattr(prepare, "_subject_codes", codes)
    frame, roles, base = load_demo(), demo_roles(), demo_settings()
    wb = Workbench()
    ds = Dataset.from_frame(frame)
    wb.selection(ds, roles, base)
    first = dict(calls)
    assert first == {"dates": 2, "codes": 1}       # visit date and event date, subject ids
    for change in (dict(min_visits=4), dict(time_max=48.0), dict(require_covariate=False),
                   dict(covariate="age_at_tx")):
        got = wb.selection(ds, roles, base.replace(**change))
        # reference: a fresh, uncached selection on the same table
        ref = prepare.select_cohort(frame, roles, base.replace(**change).only(
            Workbench.stage_fields("selection", base)))
        np.testing.assert_array_equal(got.panel.y, ref.panel.y)
        np.testing.assert_array_equal(got.subject_ids, ref.subject_ids)
        pd.testing.assert_frame_equal(got.attrition.to_frame(), ref.attrition.to_frame())
    # the uncached references parsed again; the workbench did not
    # counted by hand: subject, response, time, event date, and one kind per covariate
    assert wb.compute_counts["columns"] == 4 + len(roles.covariates)
    assert calls["codes"] == first["codes"] + 4


def test_a_new_date_order_parses_the_dates_again_but_not_the_ids(monkeypatch):
    wb = Workbench()
    ds = Dataset.from_frame(load_demo())
    roles, base = demo_roles(), demo_settings()
    wb.selection(ds, roles, base)
    n = wb.compute_counts["columns"]
    wb.selection(ds, roles, base.replace(date_order="day-first"))
    # visit date and event date again (the order is part of their key); ids, response and
    # covariate kinds reused
    assert wb.compute_counts["columns"] == n + 2


def test_bad_event_dates_keep_their_message_and_do_not_matter_without_that_origin():
    frame = load_demo()
    frame.loc[5, "tx_date"] = "not a date"
    roles, base = demo_roles(), demo_settings()
    ds = Dataset.from_frame(frame)
    wb = Workbench()
    # reference: the message of an uncached selection
    with pytest.raises(DataError) as direct:
        prepare.select_cohort(frame, roles, base)
    for _ in range(2):                     # failures are not kept: asked again, same message
        with pytest.raises(DataError) as cached:
            wb.selection(ds, roles, base)
        assert str(cached.value) == str(direct.value)
    ok = wb.selection(ds, roles, base.replace(origin="first-visit"))
    assert ok.panel.n_subjects > 0
