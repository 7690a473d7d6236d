"""Reading tables: delimiter sniffing, encodings, Parquet, content hash."""
import io
import os
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from analysis.errors import DataError
from analysis.preparation.loading import Dataset, describe_columns, fingerprint, read_table, sniff_delimiter

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


# ------------------------------------------------------------------ dates: one format per column
from analysis.errors import ECHO_LIMIT, clip  # noqa: E402
from analysis.preparation.loading import column_kind, read_dates  # noqa: E402

_STAMPS = pd.to_datetime("2019-01-01") + pd.to_timedelta(
    np.random.default_rng(5).integers(0, 1500, 40), unit="D")


@pytest.mark.parametrize("fmt, order", [
    ("%Y-%m-%d", "auto"), ("%Y-%m-%d %H:%M", "auto"), ("%Y-%m-%dT%H:%M:%S", "auto"),
    ("%d.%m.%Y", "auto"), ("%d/%m/%Y", "auto"), ("%d-%m-%Y", "auto"),
    ("%m/%d/%Y", "auto"), ("%m-%d-%Y", "auto"),
    ("%d.%m.%Y %H:%M", "auto"), ("%d/%m/%Y %H:%M:%S", "auto"), ("%m/%d/%Y %H:%M", "auto"),
    ("%d.%m.%Y", "day-first"), ("%m/%d/%Y", "month-first"),
])
def test_each_date_format_reads_like_pandas_with_that_format(fmt, order):
    stamps = _STAMPS + pd.to_timedelta(np.arange(40) * 37, unit="min")
    text = pd.Series(stamps.strftime(fmt).astype(object))
    assert (stamps.day > 12).any()  # the order is told by the data
    got = read_dates(text, order=order, column="visit")
    # reference: pandas to_datetime told the format, on the same strings
    expected = pd.to_datetime(text, format=fmt)
    assert (got.to_numpy() == expected.to_numpy()).all()


def test_single_digit_day_and_month_and_empty_cells():
    text = pd.Series(["3.5.2021", "", None, "13.12.2021", " 1.1.2022 "], dtype=object)
    got = read_dates(text, column="visit")
    # reference: pandas to_datetime with the day-first format on the non-empty cells
    ref = pd.to_datetime(pd.Series(["3.5.2021", "13.12.2021", "1.1.2022"]), format="%d.%m.%Y")
    assert got.isna().tolist() == [False, True, True, False, False]
    assert (got.dropna().to_numpy() == ref.to_numpy()).all()


def test_both_orders_fitting_every_cell_stops_and_asks():
    text = pd.Series(["01/02/2021", "03/04/2021", "12/11/2021"])
    with pytest.raises(DataError, match="date order") as err:
        read_dates(text, column="visit", role="time")
    assert err.value.column == "visit"
    # the choice settles it; reference: pandas to_datetime with each explicit format
    day = read_dates(text, order="day-first")
    month = read_dates(text, order="month-first")
    assert (day.to_numpy() == pd.to_datetime(text, format="%d/%m/%Y").to_numpy()).all()
    assert (month.to_numpy() == pd.to_datetime(text, format="%m/%d/%Y").to_numpy()).all()


def test_mixed_orders_name_the_rows_that_do_not_fit():
    text = pd.Series(["25/01/2021", "13/02/2021", "02/28/2021", "28/03/2021", "03/30/2021"])
    with pytest.raises(DataError) as err:
        read_dates(text, column="visit", role="time")
    msg = str(err.value)
    assert "dd/mm/yyyy" in msg and "rows 4, 6" in msg and "'02/28/2021'" in msg
    assert err.value.rows == (4, 6)


def test_an_order_that_fits_no_cell_is_reported_not_guessed():
    text = pd.Series(["25/01/2021", "13/02/2021"])
    with pytest.raises(DataError, match="mm/dd/yyyy"):
        read_dates(text, order="month-first", column="visit")


def test_no_date_format_at_all_is_named():
    with pytest.raises(DataError, match=r"must hold dates such as .* rows 2, 3 hold '1.2.21'"):
        read_dates(pd.Series(["1.2.21", "3.4.21"]), column="visit")


def test_iso_and_day_first_in_one_column_is_an_error():
    text = pd.Series(["2021-01-25", "2021-02-13", "20.01.2021"])
    with pytest.raises(DataError, match=r"yyyy-mm-dd.*row 4 holds '20.01.2021'"):
        read_dates(text, column="visit")


@pytest.mark.parametrize("values, kind", [
    (["64,8", "12,0", "7"], "number"),
    (["1,5", "2,25"], "number"),
    (["2021-03-05", "2021-04-01"], "date"),
    (["05.03.2021", "31.12.2021"], "date"),
    (["01/02/2021", "03/04/2021"], "date"),      # ambiguous order, but dates all the same
    (["2021-03-05", "05.03.2021"], "text"),      # two formats: not one date column
    (["5,5 mg", "3"], "text"),
    (["1.5", "nan", "2"], "number"),             # 'nan' written out is still a number column
])
def test_column_kind_decimal_commas_are_numbers_never_dates(values, kind):
    assert column_kind(pd.Series(values, dtype=object)) == kind


# ------------------------------------------------------------------ decimal commas and long ids
def test_semicolon_decimal_commas_read_as_numbers_like_pandas_decimal_option():
    text = "id;t;y;note\na;0;64,8;x\na;1,5;-0,25;y\nb;2;7;\nb;3;1,2e3;z\n"
    got = read_table(text.encode(), name="v.csv")
    # reference: pandas read_csv told the separator and the decimal mark
    expected = pd.read_csv(io.StringIO(text), sep=";", decimal=",")
    for c in ("t", "y"):
        assert got[c].dtype == float
        np.testing.assert_array_equal(got[c].to_numpy(), expected[c].to_numpy(float))
    assert got["note"].dtype != float


def test_decimal_commas_with_nan_written_out_read_like_the_point_decimal_file():
    # reference: the same table written with decimal points, read by the same reader (a cell
    # written 'nan' must not turn a decimal-comma column into text: it was a covariate read
    # as categories, e.g. a group called "10,10")
    comma = read_table(b"id;x;y\na;8,1;1\nb;nan;2,5\nc;10,3;inf\n", name="c.csv")
    point = read_table(b"id,x,y\na,8.1,1\nb,nan,2.5\nc,10.3,inf\n", name="p.csv")
    for c in ("x", "y"):
        assert comma[c].tolist() == point[c].tolist()
        assert column_kind(comma[c]) == column_kind(point[c]) == "number"


def test_quoted_comma_numbers_in_a_comma_file_are_not_rescaled():
    # in a comma-separated file "1,234" is ambiguous (thousands?): left as text
    got = read_table(b'id,y\na,"1,234"\nb,"2,5"\n', name="v.csv")
    assert got["y"].tolist() == ["1,234", "2,5"]


def test_long_integer_ids_with_empty_cells_keep_their_exact_text():
    ids = [9007199254740993 + k for k in range(6)]  # above 2**53: a float merges neighbours
    assert len({float(i) for i in ids}) < len(ids)
    text = "id,t,y\n" + "".join(f"{i},{k},1\n" for k, i in enumerate(ids)) + ",9,1\n"
    got = read_table(text.encode(), name="v.csv")
    # reference: Python's exact integers parsed from the same text
    assert [int(v) for v in got["id"].dropna()] == ids


def test_large_measurements_written_in_exponent_form_stay_numbers():
    got = read_table(b"id,y\na,1e17\nb,\nc,2.5e16\n", name="v.csv")
    # reference: pandas read_csv on the same text
    expected = pd.read_csv(io.StringIO("id,y\na,1e17\nb,\nc,2.5e16\n"))
    np.testing.assert_array_equal(got["y"].to_numpy(float), expected["y"].to_numpy(float))


def test_nan_and_inf_cells_are_kept_for_the_checks_and_na_is_missing():
    got = read_table(b"id,y,z\na,nan,NA\nb,2,\nc,inf,3\n", name="v.csv")
    assert got["y"].tolist()[0] == "nan"
    assert got["z"].isna().tolist() == [True, True, False]


# ------------------------------------------------------------------ files that cannot be read
def test_a_file_that_is_only_a_byte_order_mark_is_empty():
    with pytest.raises(DataError, match="is empty"):
        read_table(b"\xef\xbb\xbf", name="bom.csv")
    with pytest.raises(DataError, match="is empty"):
        read_table(b"\xef\xbb\xbf \n", name="bom.csv")


def test_folder_missing_broken_link_and_unreadable(tmp_path, monkeypatch):
    with pytest.raises(DataError, match="is a folder"):
        read_table(tmp_path)
    with pytest.raises(DataError, match="file not found"):
        read_table(tmp_path / "nope.csv")
    (tmp_path / "link.csv").symlink_to(tmp_path / "gone.csv")
    with pytest.raises(DataError, match="does not exist"):
        read_table(tmp_path / "link.csv")
    fifo = tmp_path / "pipe.csv"
    os.mkfifo(fifo)  # opening it would wait for a writer: refused before any read
    with pytest.raises(DataError, match="not a regular file"):
        read_table(fifo)
    p = tmp_path / "x.csv"
    p.write_text("a,b\n1,2\n")

    def refuse(self):
        raise PermissionError(13, "Permission denied")

    monkeypatch.setattr(type(p), "read_bytes", refuse)
    with pytest.raises(DataError, match="cannot be read"):
        read_table(p)


def test_an_unused_nested_parquet_column_does_not_stop_anything(tmp_path):
    frame = pd.DataFrame({"id": ["a", "a", "b"], "t": [0.0, 1.0, 0.0], "y": [1.0, 2.0, 3.0],
                          "extra": [{"k": 1}, {"k": 2}, {"k": 3}], "tags": [[1], [2, 3], []]})
    p = tmp_path / "n.parquet"
    frame.to_parquet(p)
    got = read_table(p)
    ds = Dataset.from_frame(got)
    assert ds.key == Dataset.from_frame(read_table(p)).key
    kinds = {c["name"]: c["kind"] for c in describe_columns(got)}
    assert kinds == {"id": "text", "t": "number", "y": "number", "extra": "text", "tags": "text"}


def test_clip_cuts_long_text_with_an_ellipsis():
    assert clip("x" * 5) == "xxxxx"
    cut = clip("y" * 1_000_000)
    assert len(cut) == ECHO_LIMIT and cut.endswith("…")


# ------------------------------------------------------------------ end to end through the CLI
import json  # noqa: E402
import math  # noqa: E402

from analysis.preparation.demo import DEMO_CSV, demo_roles, demo_settings  # noqa: E402
from analysis.pipeline import explore  # noqa: E402
from app.cli import main  # noqa: E402


def _close(a, b, path="$"):
    """Recursive equality with floats compared to 1e-12 relative (parsers may round differently
    in the last bit)."""
    if isinstance(a, dict):
        assert isinstance(b, dict) and a.keys() == b.keys(), path
        for k in a:
            _close(a[k], b[k], f"{path}.{k}")
    elif isinstance(a, list):
        assert isinstance(b, list) and len(a) == len(b), path
        for i, (x, y) in enumerate(zip(a, b)):
            _close(x, y, f"{path}[{i}]")
    elif isinstance(a, float) and isinstance(b, (int, float)):
        assert math.isclose(a, b, rel_tol=1e-12, abs_tol=1e-12), (path, a, b)
    else:
        assert a == b, (path, a, b)


@pytest.fixture(scope="module")
def semicolon_registry(tmp_path_factory):
    """The demo registry written the continental way: ';' separated, decimal commas,
    dates day first (dd.mm.yyyy)."""
    frame = pd.read_csv(DEMO_CSV)
    for c in ("tx_date", "visit_date"):
        frame[c] = pd.to_datetime(frame[c], format="%Y-%m-%d").dt.strftime("%d.%m.%Y")
    path = tmp_path_factory.mktemp("dc") / "registry_semicolon.csv"
    frame.to_csv(path, sep=";", decimal=",", index=False)
    assert "64,8" in path.read_text() or ",8;" in path.read_text()
    return path


def test_semicolon_decimal_comma_registry_summarizes_like_the_original(semicolon_registry,
                                                                      tmp_path):
    roles, settings = demo_roles(), demo_settings()
    spec = tmp_path / "spec.json"
    spec.write_text(json.dumps({"settings": settings.to_dict(), "roles": roles.to_dict()}))
    out = tmp_path / "out.json"
    assert main(["summarize", str(semicolon_registry), "--settings", str(spec),
                 "--json", str(out)]) == 0
    got = json.loads(out.read_text())
    # reference: the original comma/ISO file read by pandas' own read_csv, same analysis
    expected = json.loads(json.dumps(explore(pd.read_csv(DEMO_CSV), roles, settings).to_json()))
    assert got["cohort"]["subjects"] == expected["cohort"]["subjects"] > 1000
    assert [s["subject"] for s in got["subjects"]] == [s["subject"] for s in expected["subjects"]]
    _close(got, expected)


def test_semicolon_registry_upload_bytes_read_like_the_path(semicolon_registry):
    # the page's upload path hands the same bytes to read_table
    frame = read_table(semicolon_registry.read_bytes(), name="registry_semicolon.csv")
    ref = pd.read_csv(DEMO_CSV)
    for c in ("egfr", "urine_protein_ratio", "months_since_tx", "age_at_tx"):
        assert pd.api.types.is_numeric_dtype(frame[c]), c
        # reference: the original file's numbers read by pandas
        np.testing.assert_allclose(frame[c].to_numpy(float), ref[c].to_numpy(float), rtol=1e-12)
    import base64

    from app.hub import decode_upload

    url = "data:text/csv;base64," + base64.b64encode(semicolon_registry.read_bytes()).decode()
    uploaded = read_table(decode_upload(url, "registry_semicolon.csv"), name="registry.csv")
    pd.testing.assert_frame_equal(uploaded, frame)
    assert describe_columns(frame[["egfr", "visit_date"]])[0]["kind"] == "number"
    assert describe_columns(frame[["egfr", "visit_date"]])[1]["kind"] == "date"


@pytest.mark.parametrize("with_gap", [False, True])
def test_twenty_sixteen_digit_ids_stay_twenty_through_the_cli(tmp_path, with_gap):
    ids = [9007199254740993 + k for k in range(20)]  # above 2**53: floats would merge pairs
    lines = ["pid,t,y"] + [f"{i},{t},{float(k + t)}" for k, i in enumerate(ids) for t in range(3)]
    if with_gap:
        lines.append(",3,1.0")  # an empty id cell makes pandas read the column as floats
    p = tmp_path / "ids.csv"
    p.write_text("\n".join(lines) + "\n")
    out = tmp_path / "out.json"
    assert main(["summarize", str(p), "--subject", "pid", "--time", "t", "--response", "y",
                 "--json", str(out)]) == 0
    got = json.loads(out.read_text())
    # reference: the 20 Python integers written to the file
    assert got["cohort"]["subjects"] == 20
    assert sorted(int(s["subject"]) for s in got["subjects"]) == ids


@pytest.mark.parametrize("order, fmt", [("day-first", "%d/%m/%Y"), ("month-first", "%m/%d/%Y")])
def test_cli_date_order_flag_settles_an_unclear_column(tmp_path, order, fmt):
    src = Path(__file__).resolve().parent / "data" / "bad" / "dates_order_unclear.csv"
    out = tmp_path / "out.json"
    assert main(["summarize", str(src), "--subject", "id", "--time", "t", "--response", "y",
                 "--origin", "first-visit", "--unit", "days", "--date-order", order,
                 "--json", str(out)]) == 0
    got = json.loads(out.read_text())
    assert got["settings"]["date_order"] == order
    # reference: pandas to_datetime with the explicit format (days since each first visit),
    # then numpy least-squares slopes per subject
    raw = pd.read_csv(src)
    t = pd.to_datetime(raw["t"], format=fmt)
    raw["days"] = (t - t.groupby(raw["id"]).transform("min")).dt.days.astype(float)
    expected = {k: np.polyfit(g["days"], g["y"], 1)[0] for k, g in raw.groupby("id")}
    assert {s["subject"]: s["slope"] for s in got["subjects"]} == pytest.approx(expected)


def test_cli_runs_with_an_unused_nested_parquet_column(tmp_path):
    frame = pd.DataFrame({"id": list("aaabbbccc"), "t": [0.0, 1.0, 2.0] * 3,
                          "y": [1.0, 2.0, 4.0, 1.0, 3.0, 5.0, 2.0, 2.0, 2.0],
                          "extra": [{"k": i, "v": [i]} for i in range(9)]})
    p = tmp_path / "n.parquet"
    frame.to_parquet(p)
    out = tmp_path / "out.json"
    assert main(["summarize", str(p), "--subject", "id", "--time", "t", "--response", "y",
                 "--json", str(out)]) == 0
    # reference: numpy least-squares slope of subject a's three points
    slope = np.polyfit([0.0, 1.0, 2.0], [1.0, 2.0, 4.0], 1)[0]
    got = {s["subject"]: s["slope"] for s in json.loads(out.read_text())["subjects"]}
    assert got["a"] == pytest.approx(slope)
