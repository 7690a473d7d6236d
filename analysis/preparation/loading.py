"""Reading cohort tables: CSV (delimiter sniffed), Parquet, or a DataFrame.

Nothing here writes to disk. Uploaded bytes are parsed in memory.
"""
from __future__ import annotations

import csv
import hashlib
import io
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from ..errors import DataError, clip, quoted, rows_hold

_DELIMITERS = (",", ";", "\t")
_DELIMITER_NAMES = {",": "comma", ";": "semicolon", "\t": "tab"}


@dataclass(frozen=True, eq=False)
class Dataset:
    """A loaded table with a content hash, the key every cached result hangs on.

    Attributes
    ----------
    key : str
        Hex digest of the table's content (column names, dtypes and values);
        identical tables get identical keys whatever their source.
    frame : pandas.DataFrame
        The table (treat as read-only).
    name : str
        A display name (file name or "demo registry").
    """

    key: str
    frame: pd.DataFrame
    name: str = "data"

    @classmethod
    def from_frame(cls, frame: pd.DataFrame, *, name: str = "data") -> "Dataset":
        return cls(fingerprint(frame), frame, name)


def fingerprint(frame: pd.DataFrame) -> str:
    """Content hash of a DataFrame (column names, dtypes and cell values, not the index)."""
    h = hashlib.sha1()
    h.update(repr([(str(c), str(t)) for c, t in frame.dtypes.items()]).encode())
    if len(frame):
        try:
            hashed = pd.util.hash_pandas_object(frame, index=False)
        except TypeError:  # list or record cells (e.g. a Parquet struct column): hash their text
            plain = frame.copy()
            for i in range(plain.shape[1]):
                if nested_cells(plain.iloc[:, i]).any():
                    plain.isetitem(i, plain.iloc[:, i].astype(str))
            hashed = pd.util.hash_pandas_object(plain, index=False)
        h.update(hashed.to_numpy().tobytes())
    return h.hexdigest()[:20]


def read_table(source, *, name: str | None = None) -> pd.DataFrame:
    """Read a cohort table.

    Parameters
    ----------
    source : str, pathlib.Path, bytes or pandas.DataFrame
        A file path, the raw bytes of an uploaded file, or a DataFrame (copied).
    name : str, optional
        File name, used to recognise Parquet when ``source`` is bytes and in messages.

    Returns
    -------
    pandas.DataFrame
        Columns as read; CSV cells are parsed by pandas' type inference, except that
        numbers written with a decimal comma (``64,8``) in a semicolon- or tab-separated
        file become numbers, whole numbers too long for a float (ids above 2**53 in a column
        with empty cells) keep their exact text, and the cells ``nan``/``inf`` are kept as
        written so that the analysis can name them.

    Raises
    ------
    DataError
        Missing, unreadable or non-regular file, wrong encoding, no rows, or an unknown format.
    """
    if isinstance(source, pd.DataFrame):
        return source.copy()
    if isinstance(source, (str, Path)):
        path = Path(source)
        shown = clip(path)
        if path.is_symlink() and not path.exists():
            raise DataError(f"{shown} is a link to a file that does not exist")
        if not path.exists():
            raise DataError(f"file not found: {shown}")
        if path.is_dir():
            raise DataError(f"{shown} is a folder; give the CSV or Parquet file inside it")
        if not path.is_file():
            raise DataError(f"{shown} is not a regular file (a pipe or device?); "
                            "give a CSV or Parquet file")
        name = name or path.name
        try:
            raw = path.read_bytes()
        except OSError as exc:
            raise DataError(f"{shown} cannot be read ({exc.strerror or exc}); "
                            "check that the file may be opened by this user") from None
    elif isinstance(source, (bytes, bytearray, memoryview)):
        raw = bytes(source)
    else:
        raise TypeError(f"source must be a path, bytes or DataFrame, not {type(source).__name__}")
    label = clip(name or "the file")
    if not raw.strip() or not raw.removeprefix(_BOM).strip():
        raise DataError(f"{label} is empty: expected a header row and at least one data row")
    if raw[:4] == b"PAR1" or (name or "").lower().endswith((".parquet", ".pq")):
        return _read_parquet(raw, label)
    return _read_csv(raw, label)


_BOM = b"\xef\xbb\xbf"
#: cells read as missing; 'nan' and 'inf' are not among them, so that they can be named by row
NA_CELLS = ("", "NA", "N/A", "n/a", "#N/A", "NULL", "null", "None", "<NA>")
#: a number written with a decimal comma (or a plain whole number), as in a semicolon CSV
_DECIMAL_COMMA = r"[-+]?(?:\d+,\d*|,\d+|\d+)(?:[eE][-+]?\d+)?"
_FLOAT_EXACT = 2.0 ** 53
#: cells that a number parser reads as not-a-number or infinite
NON_FINITE_TEXT = frozenset({"nan", "+nan", "-nan", "inf", "+inf", "-inf", "infinity",
                             "+infinity", "-infinity"})


def _read_parquet(raw: bytes, label: str) -> pd.DataFrame:
    try:
        return pd.read_parquet(io.BytesIO(raw))
    except Exception as exc:  # pyarrow raises several unrelated types
        raise DataError(f"{label} could not be read as Parquet: {clip(exc)}") from None


#: CSV files from this size on are parsed by pyarrow (multithreaded) when it reads them exactly
#: as pandas would (see :func:`_read_csv_pyarrow`); smaller ones, and any file pyarrow would
#: read differently, by pandas
PYARROW_MIN_BYTES = 1 << 20


def _read_csv(raw: bytes, label: str, *, engine: str = "auto") -> pd.DataFrame:
    """``engine``: 'auto' (pyarrow from :data:`PYARROW_MIN_BYTES` on), 'pyarrow' or 'pandas';
    every engine gives the same frame and the same messages."""
    try:
        text = raw.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        raise DataError(
            f"{label} is not UTF-8 text (undecodable byte at position {exc.start}); "
            "save it as UTF-8 CSV, or as Parquet"
        ) from None
    delimiter = sniff_delimiter(text[:200_000])
    options = dict(sep=delimiter, skipinitialspace=True, keep_default_na=False,
                   na_values=list(NA_CELLS))
    frame = None
    if engine == "pyarrow" or (engine == "auto" and len(raw) >= PYARROW_MIN_BYTES):
        frame = _read_csv_pyarrow(raw.removeprefix(_BOM), delimiter)
    if frame is None:
        try:
            frame = pd.read_csv(io.StringIO(text), **options)
        except (pd.errors.ParserError, pd.errors.EmptyDataError) as exc:
            raise DataError(
                f"{label} could not be parsed as {_DELIMITER_NAMES[delimiter]}-separated text: "
                f"{clip(exc)}"
            ) from None
    frame.columns = [str(c).strip() for c in frame.columns]
    if frame.empty:
        raise DataError(f"{label} has a header but no data rows")
    long_ints = [i for i, c in enumerate(frame.columns) if _lost_digits(frame.iloc[:, i])]
    if long_ints:
        exact = pd.read_csv(io.StringIO(text), usecols=long_ints, dtype=str, **options)
        for k, i in enumerate(long_ints):
            cells = exact.iloc[:, k].str.strip()
            if cells.dropna().str.fullmatch(r"[-+]?\d+").all():  # whole numbers written out
                frame[frame.columns[i]] = cells
    if delimiter != ",":
        for i in range(frame.shape[1]):
            converted = decimal_comma_numbers(frame.iloc[:, i])
            if converted is not None:
                frame[frame.columns[i]] = converted
    return frame


def _read_csv_pyarrow(raw: bytes, delimiter: str) -> pd.DataFrame | None:
    """The table as pandas' reader in :func:`_read_csv` gives it, parsed by pyarrow; None when
    pyarrow cannot read it or might read it differently (the caller then uses pandas, whose
    messages name the problem): a row with a different number of fields, a column whose type
    changes after the first block, duplicate or empty header names, cells with leading
    spaces (pandas strips them), text 'nan' in a number column (pandas keeps it as text so
    that the analysis can name it), whole numbers beyond a float's exact range, booleans or
    other types pandas treats otherwise. Calendar
    dates stay text, as pandas leaves them."""
    import pyarrow as pa
    import pyarrow.compute as pc
    from pyarrow import csv as pacsv

    def read(types=None):
        return pacsv.read_csv(
            io.BytesIO(raw), parse_options=pacsv.ParseOptions(delimiter=delimiter),
            convert_options=pacsv.ConvertOptions(
                null_values=list(NA_CELLS), strings_can_be_null=True,
                quoted_strings_can_be_null=True, column_types=types or {}))

    try:
        table = read()
        names = table.column_names
        if len(set(names)) != len(names) or any(not str(n).strip() for n in names):
            return None
        dated = {n: pa.string() for n, t in zip(names, table.schema.types)
                 if pa.types.is_temporal(t)}
        if dated:
            table = read(dated)
    except (pa.ArrowInvalid, pa.ArrowNotImplementedError, pa.ArrowTypeError, ValueError):
        return None
    if table.num_rows == 0:
        return None
    for col, t in zip(table.columns, table.schema.types):
        if pa.types.is_string(t) or pa.types.is_large_string(t):
            if pc.any(pc.match_substring_regex(col, r"^\s")).as_py():
                return None
        elif pa.types.is_floating(t):
            if pc.any(pc.is_nan(col)).as_py():
                return None
        elif not pa.types.is_integer(t):
            return None
    frame = table.to_pandas()
    if any(_lost_digits(frame.iloc[:, i]) for i in range(frame.shape[1])):
        return None   # ids beyond a float's exact range: pandas keeps their text
    return frame


def _lost_digits(s: pd.Series) -> bool:
    """A float column (read so because of empty cells) holding whole numbers above 2**53,
    which a float cannot hold exactly: long ids that would otherwise merge."""
    if not pd.api.types.is_float_dtype(s):
        return False
    v = s.to_numpy(dtype=float, na_value=np.nan)
    finite = v[np.isfinite(v)]
    return bool((np.abs(finite) >= _FLOAT_EXACT).any() and (finite == np.round(finite)).all())


def decimal_comma_numbers(s: pd.Series) -> pd.Series | None:
    """The column as floats if every non-missing cell is a number written with a decimal
    comma (``64,8``, ``-0,5``, ``1,2e3``) or a whole number, and at least one has a comma;
    otherwise None. Cells written 'nan' or 'inf' (:data:`NON_FINITE_TEXT`) do not stop it:
    the column then comes back as text with decimal points, exactly as a point-decimal file
    reads, so that the analysis names those cells the same way."""
    if not (pd.api.types.is_object_dtype(s) or pd.api.types.is_string_dtype(s)):
        return None
    values = s.dropna()
    if values.empty or not all(isinstance(v, str) for v in values.iloc[:50]):
        return None
    values = values.astype("string").str.strip()
    values = values[values != ""]

    def readable(v: pd.Series) -> pd.Series:
        return v.str.fullmatch(_DECIMAL_COMMA) | v.str.lower().isin(NON_FINITE_TEXT)

    sample = values.iloc[:: max(1, len(values) // 500)]
    if not (readable(sample).all() and readable(values).all()
            and values.str.contains(",", regex=False).any()):
        return None
    if values.str.lower().str.lstrip("+-").eq("nan").any():
        # pandas keeps a point-decimal column with a written 'nan' as text (and reads 'inf'
        # as a number): the same here, in the column's own text type
        return s.str.strip().str.replace(",", ".", regex=False)
    text = s.astype("string").str.strip().str.replace(",", ".", regex=False)
    return pd.to_numeric(text.mask(text == ""), errors="coerce").astype(float)


def sniff_delimiter(text: str) -> str:
    """Comma, semicolon or tab: whichever splits the first lines into equal, >1 field counts."""
    lines = [ln for ln in text.splitlines()[:50] if ln.strip()]
    sample = "\n".join(lines)
    try:
        return csv.Sniffer().sniff(sample, delimiters="".join(_DELIMITERS)).delimiter
    except csv.Error:
        pass
    best, best_score = ",", -1
    for d in _DELIMITERS:
        counts = [len(next(csv.reader([ln], delimiter=d))) for ln in lines[:20]]
        if counts and min(counts) > 1:
            score = counts.count(counts[0]) * 100 + counts[0]
            if score > best_score:
                best, best_score = d, score
    return best


def describe_columns(frame: pd.DataFrame, *, n_examples: int = 3) -> list[dict]:
    """One dict per column: name, kind ('number', 'date' or 'text'), n_missing, examples."""
    out = []
    for col in frame.columns:
        s = frame[col]
        nested = nested_cells(s)
        shown = s.dropna().astype(str) if nested.any() else s.dropna()
        out.append({
            "name": str(col),
            "kind": "text" if nested.any() else column_kind(s),
            "n_missing": int(s.isna().sum()),
            "examples": [clip(v, 60) for v in shown.unique()[:n_examples]],
        })
    return out


def nested_cells(s: pd.Series) -> np.ndarray:
    """Which cells hold a list, record or array (e.g. a Parquet list or struct column)."""
    if not pd.api.types.is_object_dtype(s):
        return np.zeros(len(s), dtype=bool)
    return np.fromiter((isinstance(v, (list, tuple, dict, set, np.ndarray)) for v in s),
                       dtype=bool, count=len(s))


def column_kind(s: pd.Series) -> str:
    """'number' if every non-missing value is numeric (a decimal comma counts), 'date' if every
    one parses with one date format (see :func:`read_dates`), otherwise 'text'."""
    values = s.dropna()
    if values.empty:
        return "text"
    if pd.api.types.is_bool_dtype(s):
        return "text"
    if pd.api.types.is_numeric_dtype(s):
        return "number"
    if pd.api.types.is_datetime64_any_dtype(s):
        return "date"
    if nested_cells(values.iloc[:50]).any():
        return "text"
    # a spread-out sample rules a kind out cheaply before the whole column is converted
    sample = values.iloc[:: max(1, len(values) // 500)]
    if _numbers(sample).all() and _numbers(values).all():
        return "number"
    if decimal_comma_numbers(values) is not None:
        return "number"
    if (_best_dates(_text(sample), "auto").n_bad == 0
            and _best_dates(_text(values), "auto").n_bad == 0):
        return "date"
    return "text"


def _numbers(values: pd.Series) -> np.ndarray:
    """Which cells a number parser reads (written 'nan' or 'inf' counts: the analysis
    names such cells where it needs finite numbers)."""
    ok = pd.to_numeric(values, errors="coerce").notna().to_numpy().copy()
    if not ok.all():
        text = values[~ok].astype("string").str.strip().str.lower()
        ok[~ok] = text.isin(NON_FINITE_TEXT).fillna(False).to_numpy(dtype=bool)
    return ok


# --------------------------------------------------------------------------- dates
#: a date written year first (ISO 8601 and its common relatives)
_YEAR_FIRST = r"\d{4}[-/.]\d{1,2}[-/.]\d{1,2}(?:[T ].*)?"
#: a date written with the year last: day and month (in either order), separator, year
_YEAR_LAST = r"(\d{1,2})([./-])(\d{1,2})\2(\d{4})(?:[T ]\d{1,2}:\d{2}(?::\d{2}(?:\.\d+)?)?)?"
_SEP_NAMES = {".": "dots", "/": "slashes", "-": "dashes"}


@dataclass(frozen=True, eq=False)
class _DateParse:
    """One date format tried on a whole column."""

    label: str                 # e.g. 'dd.mm.yyyy' (for messages)
    parsed: pd.Series          # datetime64, NaT where a cell does not fit
    bad: np.ndarray            # bool per cell: present but not of this format
    ambiguous: str | None = None   # the other order's label when both orders fit every cell

    @property
    def n_bad(self) -> int:
        return int(self.bad.sum())


def _text(s: pd.Series) -> pd.Series:
    """Stripped text with empty cells as missing."""
    text = s.astype("string").str.strip()
    return text.mask(text == "")


def _to_naive(parsed: pd.Series) -> pd.Series:
    if isinstance(parsed.dtype, pd.DatetimeTZDtype):
        return parsed.dt.tz_convert("UTC").dt.tz_localize(None)
    return parsed


def _with_format(text: pd.Series, base: str) -> pd.Series:
    """Parse with ``base`` (a strptime date format); cells with a time of day with
    ``base`` + ' %H:%M' or ' %H:%M:%S' (or 'T' in place of the space)."""
    out = pd.to_datetime(text, format=base, errors="coerce")
    rest = out.isna() & text.notna() & text.str.contains(":", regex=False).fillna(False)
    if rest.any():
        out = out.copy()
        for tail in (" %H:%M", " %H:%M:%S", " %H:%M:%S.%f", "T%H:%M", "T%H:%M:%S"):
            part = pd.to_datetime(text[rest], format=base + tail, errors="coerce")
            out[rest] = part
            rest = out.isna() & rest
            if not rest.any():
                break
    return out


def _year_first(text: pd.Series) -> pd.Series:
    try:
        out = pd.to_datetime(text, format="ISO8601", errors="coerce")
    except (ValueError, TypeError):  # e.g. several time-zone offsets in one column
        out = pd.Series([pd.to_datetime(v, format="ISO8601", errors="coerce", utc=True)
                         for v in text], index=text.index)
        out = pd.to_datetime(out, utc=True)
    return _to_naive(out)


def _best_dates(text: pd.Series, order: str) -> _DateParse:
    """The single date format that fits the most cells of ``text`` (stripped, empty = NA).

    Year-first dates (ISO 8601) are one format. Year-last dates are read with the
    separator most cells use, day first or month first as ``order`` says; with
    ``order='auto'`` both are tried, and when both fit every cell the result is
    marked ambiguous.
    """
    present = text.notna().to_numpy()
    none = pd.Series(pd.NaT, index=text.index, dtype="datetime64[ns]")
    if not present.any():
        return _DateParse("yyyy-mm-dd", none, np.zeros(len(text), dtype=bool))
    values = text[present]
    sample = values.iloc[:: max(1, len(values) // 500)]
    year_first = sample.str.fullmatch(_YEAR_FIRST).fillna(False).mean()
    seps = sample.str.extract(r"^\d{1,2}([./-])\d{1,2}[./-]\d{4}", expand=False).value_counts()
    if seps.empty or year_first >= seps.iloc[0] / len(sample):
        parsed = _year_first(text)
        return _DateParse("yyyy-mm-dd", parsed, present & parsed.isna().to_numpy())
    sep = seps.index[0]
    orders = ("day-first", "month-first") if order == "auto" else (order,)
    tries = []
    for o in orders:
        base = f"%d{sep}%m{sep}%Y" if o == "day-first" else f"%m{sep}%d{sep}%Y"
        label = f"dd{sep}mm{sep}yyyy" if o == "day-first" else f"mm{sep}dd{sep}yyyy"
        parsed = _with_format(text, base)
        tries.append(_DateParse(label, parsed, present & parsed.isna().to_numpy()))
    tries.sort(key=lambda t: t.n_bad)
    best = tries[0]
    if len(tries) == 2 and best.n_bad == 0 and tries[1].n_bad == 0:
        best = _DateParse(best.label, best.parsed, best.bad, ambiguous=tries[1].label)
    return best


def read_dates(s: pd.Series, *, order: str = "auto", column: str = "", role: str = "date"
               ) -> pd.Series:
    """Parse a date column with ONE format for the whole column; never guess.

    Formats: yyyy-mm-dd (ISO 8601, optionally with a time of day), and dd.mm.yyyy,
    dd/mm/yyyy, dd-mm-yyyy or month first mm/dd/yyyy (same separators), each optionally
    followed by hh:mm or hh:mm:ss.

    Parameters
    ----------
    s : Series
        Text (or already datetime) cells; empty cells become NaT.
    order : {'auto', 'day-first', 'month-first'}
        How to read year-last dates. 'auto' takes the one order that fits every cell.
    column, role : str
        Named in messages.

    Raises
    ------
    DataError
        Cells that do not fit the column's format (first rows named); or, with
        ``order='auto'``, a column that reads both day first and month first.
    """
    if pd.api.types.is_datetime64_any_dtype(s):
        return _to_naive(s)
    best = _best_dates(_text(s), order)
    name = f"column '{clip(column)}' ({role})"
    if best.ambiguous:
        first = _text(s).dropna().iloc[0]
        raise DataError(
            f"{name} holds dates that read both as {best.label} and as {best.ambiguous} "
            f"(every day is 12 or less, e.g. {quoted(first)}); choose the date order "
            "'day-first' or 'month-first'", column=column)
    if best.n_bad:
        rows = np.flatnonzero(best.bad)
        examples = _text(s)[best.bad].unique()[:3]
        if best.n_bad == int(_text(s).notna().sum()):
            raise DataError(
                f"{name} must hold dates such as 2021-03-15, 15.03.2021 or 03/15/2021; "
                f"{rows_hold(rows, examples)}"
                + (f" (with the date order '{order}' they are read as {best.label})"
                   if order != "auto" and best.label != "yyyy-mm-dd" else ""),
                column=column, positions=rows[:20])
        raise DataError(
            f"{name} must hold dates in one format; most cells are written {best.label}, but "
            f"{rows_hold(rows, examples)}; write every date of the column the same way "
            "(e.g. 2021-03-15)", column=column, positions=rows[:20])
    return best.parsed


def date_fraction(s: pd.Series, order: str = "auto") -> float:
    """Share of the non-empty cells that fit the column's best single date format."""
    text = _text(s)
    n = int(text.notna().sum())
    return 1.0 - _best_dates(text, order).n_bad / n if n else 0.0


def parse_dates(s: pd.Series, order: str = "auto") -> pd.Series:
    """Dates read with the column's best single format; cells that do not fit → NaT
    (no error; see :func:`read_dates` for the checked version)."""
    if pd.api.types.is_datetime64_any_dtype(s):
        return _to_naive(s)
    return _best_dates(_text(s), order).parsed
