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
    # counted by hand: subject, response, time, event date, the rows' (subject, time) order,
    # the subject ids as text, and one kind and one set of value codes per covariate
    assert wb.compute_counts["columns"] == 6 + 2 * len(roles.covariates)
    assert calls["codes"] == first["codes"] + 4


def test_a_new_date_order_parses_the_dates_again_but_not_the_ids(monkeypatch):
    wb = Workbench()
    ds = Dataset.from_frame(load_demo())
    roles, base = demo_roles(), demo_settings()
    wb.selection(ds, roles, base)
    n = wb.compute_counts["columns"]
    wb.selection(ds, roles, base.replace(date_order="day-first"))
    # visit date, event date and the rows' (subject, time) order again (the date order is part
    # of their key); ids, response and covariate kinds reused
    assert wb.compute_counts["columns"] == n + 3


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


def test_parallel_requests_compute_a_shared_stage_once():
    """The page's view callbacks run in parallel threads and share stages: each stage is
    computed once (brute-force count of the compute calls in the test)."""
    import threading
    import time

    from analysis.pipeline import ResultCache

    cache = ResultCache(max_entries=8)
    calls = []

    def slow():
        calls.append(1)
        time.sleep(0.3)
        return "value"

    got = []
    threads = [threading.Thread(target=lambda: got.append(cache.get_or_compute("k", slow)))
               for _ in range(4)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert len(calls) == 1
    assert sorted(fresh for _, fresh in got) == [False, False, False, True]
    assert all(v == "value" for v, _ in got)

    # a failing computation is not kept: every waiter meets the error itself
    def broken():
        calls.append(2)
        time.sleep(0.1)
        raise DataError("column 'x' is broken")

    errors = []

    def ask():
        try:
            cache.get_or_compute("bad", broken)
        except DataError as exc:
            errors.append(str(exc))

    threads = [threading.Thread(target=ask) for _ in range(3)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert errors == ["column 'x' is broken"] * 3 and "bad" not in cache


def test_workbench_stages_shared_by_parallel_views_run_once():
    import threading

    wb = Workbench()
    ds = Dataset.from_frame(load_demo())
    roles, base = demo_roles(), demo_settings()
    threads = [threading.Thread(target=lambda: wb.subject_lines(ds, roles, base)),
               threading.Thread(target=lambda: wb.summaries(ds, roles, base)),
               threading.Thread(target=lambda: wb.variogram(ds, roles, base))]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    # every stage counted by the Workbench's own counter: one computation each
    assert wb.compute_counts["selection"] == 1 and wb.compute_counts["cohort"] == 1
    assert wb.compute_counts["subject_fits"] == 1


def test_categorical_baselines_from_codes_equal_grouping_the_values():
    """Reference: the grouping of the covariate values themselves (the path taken when
    repeated visits are averaged, identical here because no visit repeats)."""
    frame = load_demo()
    rng = np.random.default_rng(3)
    # a categorical covariate that changes within some subjects and is missing on some rows
    frame["site"] = np.where(rng.random(len(frame)) < 0.02, "Z", frame["centre"])
    frame.loc[rng.random(len(frame)) < 0.05, "site"] = None
    frame.loc[frame.index[:40], "donor_type"] = None
    roles = demo_roles().__class__.from_dict({**demo_roles().to_dict(),
                                             "covariates": ["urine_protein_ratio", "site",
                                                            "donor_type", "sex", "age_at_tx"]})
    base = demo_settings()
    fast = prepare.select_cohort(frame, roles, base)
    grouped = prepare.select_cohort(frame, roles, base.replace(duplicates="average"))
    pd.testing.assert_frame_equal(fast.baseline, grouped.baseline)
    assert fast.warnings == grouped.warnings
    assert any("'site' changes within" in w for w in fast.warnings)


def test_per_subject_rules_start_from_the_cached_ordered_visits():
    """Fewest visits and requiring the covariate re-run only the per-subject rules; each
    result equals an uncached selection (reference: ``select_cohort`` on the table), also
    after the cached ordered visits served other settings first (they are not changed)."""
    frame, roles, base = load_demo(), demo_roles(), demo_settings()
    wb = Workbench()
    ds = Dataset.from_frame(frame)
    changes = (dict(min_visits=5), dict(require_covariate=False),
               dict(min_visits=2, require_covariate=False), {})
    for change in changes:
        got = wb.selection(ds, roles, base.replace(**change))
        ref = prepare.select_cohort(frame, roles, base.replace(**change).only(
            Workbench.stage_fields("selection", base)))
        np.testing.assert_array_equal(got.panel.codes, ref.panel.codes)
        np.testing.assert_array_equal(got.panel.time, ref.panel.time)
        np.testing.assert_array_equal(got.panel.y, ref.panel.y)
        np.testing.assert_array_equal(got.subject_ids, ref.subject_ids)
        pd.testing.assert_frame_equal(got.baseline, ref.baseline)
        pd.testing.assert_frame_equal(got.attrition.to_frame(), ref.attrition.to_frame())
        np.testing.assert_array_equal(got.followup.origin, ref.followup.origin)
        assert got.warnings == ref.warnings
    assert wb.compute_counts["ordered"] == 1
    assert wb.compute_counts["selection"] == len(changes)


@pytest.mark.parametrize("ids", ["text", "integers"])
def test_subject_columns_are_what_pandas_makes_of_the_ids(ids):
    """The per-subject tables take their id column from a text array made once; reference:
    pandas' own reading of the ids as a numpy object array (values and dtype)."""
    frame, roles, base = load_demo(), demo_roles(), demo_settings()
    if ids == "integers":
        frame["recipient_id"] = frame["recipient_id"].str.replace(r"\D", "", regex=True).astype(int)
    ds = Dataset.from_frame(frame)
    wb = Workbench()
    ex = wb.explore(ds, roles, base)
    expected = pd.Series(np.asarray(ex.cohort.subject_ids, dtype=object), name="subject")
    pd.testing.assert_series_equal(ex.cohort.baseline["subject"], expected)
    pd.testing.assert_series_equal(ex.subject_lines["subject"], expected)
    pd.testing.assert_series_equal(ex.summaries.dropout.subjects["subject"], expected)
    labels = pd.Series(np.asarray(ex.cohort.strata.labels + ("No value",), dtype=object)[
        ex.cohort.strata.codes], name="stratum_label")
    pd.testing.assert_series_equal(ex.cohort.baseline["stratum_label"], labels)
    pd.testing.assert_series_equal(ex.subject_lines["stratum_label"], labels)


@pytest.mark.parametrize("ids", ["text", "integers"])
def test_cohort_visit_table_is_what_pandas_makes_of_the_ids(ids):
    """``PreparedCohort.frame`` takes ids and group labels from the per-subject columns;
    reference: the table built from numpy object arrays of ids and labels per visit."""
    frame, roles, base = load_demo(), demo_roles(), demo_settings()
    if ids == "integers":
        frame["recipient_id"] = frame["recipient_id"].str.replace(r"\D", "", regex=True).astype(int)
    cohort = Workbench().cohort(Dataset.from_frame(frame), roles, base)
    p = cohort.panel
    codes = cohort.strata.codes[p.codes]
    labels = np.asarray(cohort.strata.labels + ("No value",), dtype=object)
    expected = pd.DataFrame({"subject": np.asarray(cohort.subject_ids, dtype=object)[p.codes],
                             "time": p.time, "response": p.y, "stratum": codes,
                             "stratum_label": labels[codes]})
    pd.testing.assert_frame_equal(cohort.frame, expected)
