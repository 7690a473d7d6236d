"""Reading cohort tables: CSV (delimiter sniffed), Parquet, or a DataFrame.

Nothing here writes to disk. Uploaded bytes are parsed in memory.
"""
from __future__ import annotations

import csv
import hashlib
import io
from dataclasses import dataclass
from pathlib import Path

import pandas as pd

from .errors import DataError

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
        h.update(pd.util.hash_pandas_object(frame, index=False).to_numpy().tobytes())
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
        Columns as read; CSV cells are parsed by pandas' type inference.

    Raises
    ------
    DataError
        Unreadable file, wrong encoding, no rows, or an unknown format.
    """
    if isinstance(source, pd.DataFrame):
        return source.copy()
    if isinstance(source, (str, Path)):
        path = Path(source)
        if not path.exists():
            raise DataError(f"file not found: {path}")
        name = name or path.name
        raw = path.read_bytes()
    elif isinstance(source, (bytes, bytearray, memoryview)):
        raw = bytes(source)
    else:
        raise TypeError(f"source must be a path, bytes or DataFrame, not {type(source).__name__}")
    label = name or "the file"
    if not raw.strip():
        raise DataError(f"{label} is empty: expected a header row and at least one data row")
    if raw[:4] == b"PAR1" or (name or "").lower().endswith((".parquet", ".pq")):
        return _read_parquet(raw, label)
    return _read_csv(raw, label)


def _read_parquet(raw: bytes, label: str) -> pd.DataFrame:
    try:
        return pd.read_parquet(io.BytesIO(raw))
    except Exception as exc:  # pyarrow raises several unrelated types
        raise DataError(f"{label} could not be read as Parquet: {exc}") from None


def _read_csv(raw: bytes, label: str) -> pd.DataFrame:
    try:
        text = raw.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        raise DataError(
            f"{label} is not UTF-8 text (undecodable byte at position {exc.start}); "
            "save it as UTF-8 CSV, or as Parquet"
        ) from None
    delimiter = sniff_delimiter(text)
    try:
        frame = pd.read_csv(io.StringIO(text), sep=delimiter, skipinitialspace=True)
    except pd.errors.ParserError as exc:
        raise DataError(
            f"{label} could not be parsed as {_DELIMITER_NAMES[delimiter]}-separated text: {exc}"
        ) from None
    frame.columns = [str(c).strip() for c in frame.columns]
    if frame.empty:
        raise DataError(f"{label} has a header but no data rows")
    return frame


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
        out.append({
            "name": str(col),
            "kind": column_kind(s),
            "n_missing": int(s.isna().sum()),
            "examples": [str(v) for v in s.dropna().unique()[:n_examples]],
        })
    return out


def column_kind(s: pd.Series) -> str:
    """'number' if every non-missing value is numeric, 'date' if every one parses as an ISO-like
    date, otherwise 'text'."""
    values = s.dropna()
    if values.empty:
        return "text"
    if pd.api.types.is_bool_dtype(s):
        return "text"
    if pd.api.types.is_numeric_dtype(s):
        return "number"
    if pd.api.types.is_datetime64_any_dtype(s):
        return "date"
    # a spread-out sample rules a kind out cheaply before the whole column is converted
    sample = values.iloc[:: max(1, len(values) // 500)]
    if (pd.to_numeric(sample, errors="coerce").notna().all()
            and pd.to_numeric(values, errors="coerce").notna().all()):
        return "number"
    if parse_dates(sample).notna().all() and parse_dates(values).notna().all():
        return "date"
    return "text"


def parse_dates(s: pd.Series) -> pd.Series:
    """Parse dates leniently (ISO 8601 first, then mixed formats); unparseable → NaT."""
    if pd.api.types.is_datetime64_any_dtype(s):
        return s
    text = s.astype("string")
    out = pd.to_datetime(text, errors="coerce", format="ISO8601")
    bad = out.isna() & text.notna()
    if bad.any():
        out2 = pd.to_datetime(text[bad], errors="coerce", format="mixed")
        out = out.copy()
        out[bad] = out2
    return out
