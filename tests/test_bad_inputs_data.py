"""The bad-input corpus (tests/data/bad/): each file makes `summarize` exit 2 with a specific
message, never a traceback. One row per case in CASES; files are written by
tests/data/bad/make_corpus.py, except the binary and file-system cases made at run time."""
from __future__ import annotations

from pathlib import Path

import pandas as pd
import pytest

from app.cli import main

BAD = Path(__file__).resolve().parent / "data" / "bad"
ROLES = ["--subject", "id", "--time", "t", "--response", "y", "--min-visits", "1"]
DATES = ROLES + ["--origin", "first-visit"]


# ------------------------------------------------------------------ run-time makers
def _folder(tmp_path, monkeypatch):
    d = tmp_path / "visits.csv"
    d.mkdir()
    return d


def _missing(tmp_path, monkeypatch):
    return tmp_path / "no_such_file.csv"


def _unreadable(tmp_path, monkeypatch):
    # tests run as root, where file permissions do not stop a read: make opening it fail
    p = tmp_path / "locked.csv"
    p.write_text("id,t,y\na,0,1\n", encoding="utf-8")
    real = Path.read_bytes

    def refuse(self):
        if self == p:
            raise PermissionError(13, "Permission denied", str(self))
        return real(self)

    monkeypatch.setattr(Path, "read_bytes", refuse)
    return p


def _parquet_struct_response(tmp_path, monkeypatch):
    p = tmp_path / "struct.parquet"
    pd.DataFrame({"id": list("aaabbbccc"), "t": [0.0, 1.0, 2.0] * 3,
                  "y": [{"value": float(i), "unit": "mg"} for i in range(9)]}).to_parquet(p)
    return p


def _parquet_list_time(tmp_path, monkeypatch):
    p = tmp_path / "list.parquet"
    pd.DataFrame({"id": list("aaabbbccc"), "t": [[0.0, 0.5]] * 9,
                  "y": [1.0, 2.0, 3.0] * 3}).to_parquet(p)
    return p


#: (case, file in tests/data/bad or a maker, extra arguments, message fragments)
CASES = [
    ("time inf", "time_infinite.csv", ROLES, ["column 't' (time)", "row 4", "finite"]),
    ("time -inf", "time_minus_infinite.csv", ROLES, ["column 't' (time)", "row 2", "finite"]),
    ("time 1e309", "time_too_large.csv", ROLES, ["column 't' (time)", "row 4", "finite"]),
    ("response nan text", "response_nan_text.csv", ROLES,
     ["column 'y' (response)", "row 3 holds 'nan'", "finite"]),
    ("response Infinity", "response_infinite.csv", ROLES,
     ["column 'y' (response)", "row 4", "finite"]),
    ("dates order unclear", "dates_order_unclear.csv", DATES,
     ["column 't' (time)", "dd/mm/yyyy", "mm/dd/yyyy", "date order"]),
    ("dates mixed order", "dates_mixed_order.csv", DATES,
     ["column 't' (time)", "dd/mm/yyyy", "rows 5, 6, 7", "'01/25/2021'"]),
    ("dates mixed formats", "dates_mixed_formats.csv", DATES,
     ["column 't' (time)", "yyyy-mm-dd", "rows 8, 9, 10", "'20.01.2021'"]),
    ("long cell", "long_cell.csv", ROLES, ["column 'y' (response)", "row 3", "xxx…"]),
    ("long column name", "long_column_name.csv", ROLES,
     ["column 'y' (response) is not in", "www…"]),
    ("BOM only", "bom_only.csv", ROLES, ["bom_only.csv is empty"]),
    ("broken link", "broken_link.csv", ROLES, ["link to a file that does not exist"]),
    ("folder", _folder, ROLES, ["is a folder"]),
    ("missing file", _missing, ROLES, ["file not found", "no_such_file.csv"]),
    ("unreadable file", _unreadable, ROLES, ["cannot be read", "Permission denied"]),
    ("parquet struct response", _parquet_struct_response, ROLES,
     ["column 'y' (response)", "lists or records", "rows 2, 3"]),
    ("parquet list time", _parquet_list_time, ROLES,
     ["column 't' (time)", "lists or records"]),
]


@pytest.mark.parametrize("case, source, args, fragments", CASES, ids=[c[0] for c in CASES])
def test_bad_input_exits_2_with_a_specific_short_message(case, source, args, fragments, tmp_path,
                                                        monkeypatch, capsys):
    path = source(tmp_path, monkeypatch) if callable(source) else BAD / source
    status = main(["summarize", str(path), *args, "--json", str(tmp_path / "out.json")])
    err = capsys.readouterr().err
    assert status == 2, err
    assert "Traceback" not in err
    for fragment in fragments:
        assert fragment in err, (fragment, err)
    # echoed cells and names are cut to about 200 characters (analysis.errors.ECHO_LIMIT)
    assert len(err) < 1200, len(err)
    assert not (tmp_path / "out.json").exists()


def test_corpus_files_match_their_generator():
    # the checked-in files are what make_corpus.py writes (so the table and files stay in step)
    import importlib.util

    spec = importlib.util.spec_from_file_location("make_corpus", BAD / "make_corpus.py")
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    for name, text in mod.TEXT_FILES.items():
        assert (BAD / name).read_bytes() == text.encode("utf-8"), name
    for name, target in mod.LINKS.items():
        assert (BAD / name).is_symlink() and str((BAD / name).readlink()) == target
