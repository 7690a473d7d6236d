"""Reading tables: delimiter sniffing, encodings, Parquet, content hash."""
import io

import numpy as np
import pandas as pd
import pytest

from analysis.errors import DataError
from analysis.loading import Dataset, describe_columns, fingerprint, read_table, sniff_delimiter

ROWS = [["id", "visit", "value"], ["a", "2020-01-01", "1.5"], ["a", "2020-02-01", "2.5"],
        ["b", "2020-01-03", "3"]]


def _text(sep: str) -> str:
    return "\n".join(sep.join(r) for r in ROWS) + "\n"


@pytest.mark.parametrize("sep", [",", ";", "\t"])
@pytest.mark.parametrize("bom", [False, True])
def test_delimiters_and_bom_match_pandas_with_explicit_separator(sep, bom):
    raw = (("\ufeff" if bom else "") + _text(sep)).encode("utf-8")
    got = read_table(raw, name="x.csv")
    # reference: pandas read_csv told the separator explicitly
    expected = pd.read_csv(io.StringIO(_text(sep)), sep=sep)
    pd.testing.assert_frame_equal(got, expected)
    assert sniff_delimiter(_text(sep)) == sep


def test_path_and_dataframe_sources(tmp_path):
    p = tmp_path / "t.csv"
    p.write_text(_text(","), encoding="utf-8")
    from_path = read_table(p)
    from_frame = read_table(from_path)
    pd.testing.assert_frame_equal(from_path, from_frame)
    assert from_frame is not from_path


def test_parquet_bytes_round_trip(tmp_path):
    frame = pd.DataFrame({"id": ["a", "b"], "t": [1.0, 2.0], "y": [3.0, 4.0]})
    p = tmp_path / "t.parquet"
    frame.to_parquet(p)
    # reference: pandas' own Parquet reader on the same file
    pd.testing.assert_frame_equal(read_table(p.read_bytes(), name="t.parquet"), pd.read_parquet(p))


@pytest.mark.parametrize("raw, pattern", [
    (b"", "is empty"),
    (b"   \n", "is empty"),
    (b"a,b\n", "no data rows"),
    ("id,value\nä,1\n".encode("latin-1"), "not UTF-8"),
    (b"PAR1 not really parquet", "Parquet"),
])
def test_unreadable_files_get_specific_messages(raw, pattern):
    with pytest.raises(DataError, match=pattern):
        read_table(raw, name="upload.csv")


def test_fingerprint_depends_on_content_only():
    a = pd.DataFrame({"x": [1, 2], "y": ["u", "v"]})
    b = pd.DataFrame({"x": [1, 2], "y": ["u", "v"]}, index=[10, 11])
    c = pd.DataFrame({"x": [1, 3], "y": ["u", "v"]})
    assert fingerprint(a) == fingerprint(b)
    assert fingerprint(a) != fingerprint(c)
    assert Dataset.from_frame(a).key == fingerprint(a)


def test_describe_columns_kinds():
    frame = read_table(_text(",").encode())
    kinds = {d["name"]: d["kind"] for d in describe_columns(frame)}
    assert kinds == {"id": "text", "visit": "date", "value": "number"}
    counts = {d["name"]: d["n_missing"] for d in describe_columns(frame)}
    # reference: pandas isna counts
    assert counts == {c: int(frame[c].isna().sum()) for c in frame.columns}
    assert np.all([len(d["examples"]) <= 3 for d in describe_columns(frame)])
