"""Caches bounded by bytes: least recently used entries go first once the estimated memory of
the results passes the budget.

References: numpy ``ndarray.nbytes`` and pandas ``DataFrame.memory_usage(deep=True)`` computed in
the test for the sizes; the eviction order is worked out by hand in each test.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd
import pytest

from analysis.preparation.demo import demo_roles, demo_settings, load_demo
from analysis.preparation.loading import Dataset
from analysis.pipeline import ResultCache, Workbench, deep_nbytes
from app.datastore import DataStore


@dataclass(frozen=True)
class Holder:
    a: np.ndarray
    f: pd.DataFrame


def test_deep_nbytes_counts_arrays_and_frames_once():
    a = np.zeros(10_000)
    f = pd.DataFrame({"x": np.arange(5_000), "s": [f"id{i}" for i in range(5_000)]})
    ref = a.nbytes + int(f.memory_usage(deep=True, index=True).sum())
    got = deep_nbytes(Holder(a, f))
    assert ref <= got < ref + 2_000           # plus the small object headers
    # the same array twice is held once
    assert deep_nbytes([a, a]) < 2 * a.nbytes


def test_result_cache_evicts_least_recently_used_by_bytes():
    mb = 1_000_000
    cache = ResultCache(max_entries=100, max_bytes=int(2.5 * mb))
    arrays = {k: np.zeros(mb // 8) for k in "abcd"}       # 1 MB each (reference: nbytes)
    assert all(v.nbytes == mb for v in arrays.values())
    cache.get_or_compute("a", lambda: arrays["a"])
    cache.get_or_compute("b", lambda: arrays["b"])
    cache.get_or_compute("a", lambda: pytest.fail("a is cached"))   # a is now the most recent
    cache.get_or_compute("c", lambda: arrays["c"])                  # 3 MB > 2.5: b goes
    assert "b" not in cache and "a" in cache and "c" in cache
    assert cache.nbytes <= cache.max_bytes
    cache.get_or_compute("d", lambda: arrays["d"])                  # a is now the oldest
    assert "a" not in cache and set("cd") <= {k for k in "abcd" if k in cache}


def test_a_result_larger_than_the_budget_is_still_returned():
    cache = ResultCache(max_entries=10, max_bytes=100)
    big = np.zeros(1_000)
    value, fresh = cache.get_or_compute("big", lambda: big)
    assert value is big and fresh and len(cache) == 1


def test_data_store_evicts_uploads_by_bytes():
    frames = [pd.DataFrame({"v": np.arange(100_000) + k}) for k in range(3)]
    size = int(frames[0].memory_usage(deep=True, index=True).sum())   # reference: pandas
    store = DataStore(max_uploads=10, max_bytes=int(2.5 * size))
    keys = [store.add(f, name=f"t{i}").key for i, f in enumerate(frames)]
    assert keys[0] not in store and keys[1] in store and keys[2] in store
    assert store.nbytes <= store.max_bytes


def test_workbench_stays_within_its_budget():
    ds = Dataset.from_frame(load_demo())
    roles = demo_roles()
    first = demo_settings().replace(min_visits=2)
    one = Workbench().selection(ds, roles, first)
    budget = int(deep_nbytes(one) * 4 / 3 * 2.5)      # room for about two selections
    wb = Workbench(max_bytes=budget)
    for k in (2, 3, 4, 5):
        wb.selection(ds, roles, demo_settings().replace(min_visits=k))
    assert 0 < wb.nbytes <= budget * 3 // 4
    assert wb.compute_counts["selection"] == 4
    wb.selection(ds, roles, demo_settings().replace(min_visits=5))   # the newest: kept
    assert wb.compute_counts["selection"] == 4
    again = wb.selection(ds, roles, first)                             # the oldest: evicted
    assert wb.compute_counts["selection"] == 5
    # reference for the recomputed result: a fresh Workbench
    assert again.panel.n_obs == one.panel.n_obs and again.panel.n_subjects == one.panel.n_subjects


def test_deep_nbytes_estimates_long_text_columns_from_a_sample():
    """Above SIZE_EXACT elements the texts are sized from an even sample; reference: every
    element's sys.getsizeof (brute force) and pandas memory_usage(deep=True)."""
    import sys

    from analysis.pipeline import SIZE_EXACT

    rng = np.random.default_rng(0)
    texts = np.array(["x" * int(k) for k in rng.integers(1, 40, 6 * SIZE_EXACT)], dtype=object)
    exact = texts.nbytes + sum(sys.getsizeof(v) for v in texts)
    assert abs(deep_nbytes(texts) / exact - 1) < 0.02
    cat = pd.DataFrame({"c": pd.Categorical.from_codes(rng.integers(0, texts.size, texts.size),
                                                       categories=pd.Index(
                                                           [f"R{i:07d}" for i in range(texts.size)],
                                                           dtype=object)),
                        "t": rng.random(texts.size)})
    ref = int(cat.memory_usage(deep=True, index=True).sum())
    assert abs(deep_nbytes(cat) / ref - 1) < 0.02
