"""The pyarrow CSV path reads every table exactly as the pandas path does (or hands it to pandas).

Reference: the project's own pandas reader (``pandas.read_csv`` with the options of
analysis/loading.py), compared frame by frame with ``pandas.testing.assert_frame_equal``.
"""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from analysis.preparation.demo import DEMO_CSV
from analysis.errors import DataError
from analysis.preparation.loading import PYARROW_MIN_BYTES, _read_csv, fingerprint, read_table

CASES = {
    "plain": "id,t,y\nA,1,2.5\nA,2,3\nB,1,4\n",
    "iso dates stay text": "id,d,y\nA,2021-03-15,1\nA,2021-03-16 10:00,2\nB,2021-04-01,3\n",
    "day-first dates": "id,d,y\nA,15.03.2021,1\nB,16.03.2021,2\n",
    "missing cells": "id,t,y,c\nA,1,,x\nA,2,NA,\nB,N/A,4,NULL\n",
    "text nan and inf": "id,t,y\nA,1,nan\nA,2,3\nB,3,inf\n",
    "inf only": "id,t,y\nA,1,inf\nA,2,3\nB,3,-inf\n",
    "leading spaces": "id, t, y\nA, 1, 2\nB, 2,  x\n",
    "semicolon decimal comma": "id;t;y\nA;1;64,8\nA;2;-0,5\nB;1;12\n",
    "tab separated": "id\tt\ty\nA\t1\t2\nB\t2\t3\n",
    "long ids with gaps": "id,t,y\n12345678901234567890,1,2\n,2,3\n12345678901234567891,3,4\n",
    "booleans": "id,t,flag\nA,1,true\nB,2,false\n",
    "duplicate header": "id,t,t\nA,1,2\nB,2,3\n",
    "quoted comma number": 'id,t,y\nA,1,"64,8"\nB,2,"3,1"\n',
    "quoted newline": 'id,t,note\nA,1,"two\nlines"\nB,2,x\n',
    "ragged": "id,t,y\nA,1,2\nB,2,3,4\n",
    "all empty column": "id,t,e\nA,1,\nB,2,\n",
    "integers": "id,t,y\n1,1,2\n2,2,3\n",
    "type changes late": "id,t,y\n" + "A,1,2\n" * 5000 + "B,2,oops\n",
}


def _both(text: str):
    raw = text.encode()
    out = []
    for engine in ("pandas", "pyarrow"):
        try:
            out.append(_read_csv(raw, "the file", engine=engine))
        except DataError as exc:
            out.append(str(exc))
    return out


@pytest.mark.parametrize("name", sorted(CASES))
def test_pyarrow_engine_reads_like_pandas(name):
    by_pandas, by_arrow = _both(CASES[name])
    if isinstance(by_pandas, str):
        assert by_arrow == by_pandas          # same message
        return
    # reference: the pandas reader's frame (dtypes, values, column names)
    pd.testing.assert_frame_equal(by_arrow, by_pandas)
    assert fingerprint(by_arrow) == fingerprint(by_pandas)


def test_demo_registry_reads_the_same_by_either_engine():
    raw = DEMO_CSV.read_bytes()
    a = _read_csv(raw, "demo", engine="pandas")
    b = _read_csv(raw, "demo", engine="pyarrow")
    # reference: the pandas reader's frame
    pd.testing.assert_frame_equal(b, a)
    assert fingerprint(a) == fingerprint(b)


def test_a_large_file_goes_through_pyarrow_and_reads_like_pandas(tmp_path):
    reps = PYARROW_MIN_BYTES // DEMO_CSV.stat().st_size + 1
    demo = pd.read_csv(DEMO_CSV, dtype=str, keep_default_na=False)
    big = pd.concat([demo] * reps, ignore_index=True)
    big["recipient_id"] = big["recipient_id"] + "-" + np.repeat(
        np.arange(reps), len(demo)).astype(str)
    path = tmp_path / "big.csv"
    big.to_csv(path, index=False)
    assert path.stat().st_size >= PYARROW_MIN_BYTES
    frame = read_table(path)
    # reference: the pandas reader on the same bytes
    pd.testing.assert_frame_equal(frame, _read_csv(path.read_bytes(), "big", engine="pandas"))
