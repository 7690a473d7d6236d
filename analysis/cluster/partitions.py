"""Subject-hash Parquet partitions: writing them, and opening them with a straddle check.

A partition is one Parquet file. Every row of a subject must sit in one partition, so that
each partition can be prepared (inclusion rules, per-subject lines, pairs of visits) on its own
and the results combined by summing. :func:`write_partitions` puts each subject in partition
``hash(label) mod n``; :func:`open_partitions` lists the files of a dataset and
:func:`check_subjects_disjoint` refuses a dataset in which a subject appears in two files.
"""
from __future__ import annotations

import glob as _glob
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from analysis.errors import DataError, clip

#: partitions written when the caller does not say
DEFAULT_PARTS = 16
#: file name pattern of a written partition
PART_NAME = "part-{:05d}.parquet"


def subject_text(values) -> np.ndarray:
    """The text a subject label is hashed on: stripped text, whole floats written as integers
    (``3.0`` and ``3`` are one subject, as in the analysis), missing -> empty text."""
    s = pd.Series(values)
    if pd.api.types.is_float_dtype(s):
        v = s.to_numpy(dtype=float, na_value=np.nan)
        out = np.array([str(int(x)) if np.isfinite(x) and x == int(x) else
                        ("" if np.isnan(x) else repr(float(x))) for x in v], dtype=object)
        return out
    text = s.astype("string").str.strip().fillna("")
    return text.to_numpy(dtype=object)


def subject_bucket(values, n_parts: int) -> np.ndarray:
    """Partition number of each label: a fixed-key hash of :func:`subject_text` mod ``n_parts``
    (the same label always lands in the same partition, on any machine)."""
    h = pd.util.hash_array(subject_text(values), categorize=True)
    return (h % np.uint64(n_parts)).astype(np.int64)


@dataclass(frozen=True)
class WrittenPartitions:
    """What :func:`write_partitions` wrote: the folder, the files, rows and subjects per file."""

    folder: str
    files: tuple[str, ...]
    rows: tuple[int, ...]
    subjects: tuple[int, ...]


def write_partitions(frame: pd.DataFrame, subject: str, out, *, n_parts: int = DEFAULT_PARTS
                     ) -> WrittenPartitions:
    """Rewrite a table into ``n_parts`` subject-hash Parquet files in folder ``out``.

    Rows keep their order within a partition. Rows without a subject go to partition 0 (the
    inclusion rules drop them and count them, as in one table). Refuses a folder that already
    holds Parquet files, so that an old partitioning is never mixed with a new one.
    """
    if subject not in frame.columns:
        raise DataError(f"column '{clip(subject)}' (subject) is not in the table", column=subject)
    n_parts = int(n_parts)
    if not 1 <= n_parts <= 100_000:
        raise DataError(f"--parts {n_parts}: must be from 1 to 100000")
    folder = Path(out)
    if folder.exists() and not folder.is_dir():
        raise DataError(f"--out {clip(folder)}: is a file; give a folder")
    if folder.is_dir() and any(folder.glob("*.parquet")):
        raise DataError(f"--out {clip(folder)}: already holds Parquet files; choose an empty "
                        "folder so that two partitionings are never mixed")
    folder.mkdir(parents=True, exist_ok=True)
    bucket = subject_bucket(frame[subject], n_parts)
    files, rows, subjects = [], [], []
    order = np.argsort(bucket, kind="stable")
    cuts = np.searchsorted(bucket[order], np.arange(n_parts + 1))
    for k in range(n_parts):
        part = frame.iloc[order[cuts[k]:cuts[k + 1]]].reset_index(drop=True)
        path = folder / PART_NAME.format(k)
        part.to_parquet(path, index=False)
        files.append(str(path))
        rows.append(len(part))
        subjects.append(int(pd.Series(subject_text(part[subject])).replace("", np.nan)
                            .nunique()))
    return WrittenPartitions(str(folder), tuple(files), tuple(rows), tuple(subjects))


def is_partitioned(source) -> bool:
    """True for a folder, a glob pattern or a remote (fsspec) address of Parquet files."""
    text = str(source)
    if "://" in text:
        return True
    if any(ch in text for ch in "*?["):
        return True
    return Path(text).is_dir()


def open_partitions(source) -> tuple[str, ...]:
    """The Parquet files of a partitioned dataset, sorted: a local folder, a glob pattern, or an
    fsspec address of a folder or pattern (``s3://bucket/cohort/``, ``memory://x/*.parquet``).
    """
    text = str(source)
    if "://" in text and not text.startswith("file://"):
        import fsspec

        fs, _, paths = fsspec.get_fs_token_paths(text)
        if len(paths) == 1 and fs.isdir(paths[0]):
            paths = [p for p in fs.ls(paths[0], detail=False) if p.endswith((".parquet", ".pq"))]
        protocol = text.split("://", 1)[0]
        files = sorted(p if "://" in p else f"{protocol}://{p}" for p in paths)
    else:
        text = text.removeprefix("file://")
        path = Path(text)
        if path.is_dir():
            files = sorted(str(p) for p in path.iterdir()
                           if p.suffix.lower() in (".parquet", ".pq") and p.is_file())
        else:
            files = sorted(_glob.glob(text))
    if not files:
        raise DataError(f"{clip(text)}: no Parquet files found (expected a folder of .parquet "
                        "files as written by 'cohortlens partition', or a glob pattern)")
    return tuple(files)


def read_partition(path: str, columns=None) -> pd.DataFrame:
    """One partition as a DataFrame (local path or fsspec address)."""
    try:
        return pd.read_parquet(path, columns=columns)
    except Exception as exc:  # pyarrow and fsspec raise several unrelated types
        raise DataError(f"partition {clip(path)} could not be read as Parquet: "
                        f"{clip(exc)}") from None


def partition_subjects(path: str, subject: str) -> np.ndarray:
    """Distinct subject texts of one partition (reads the subject column only)."""
    frame = read_partition(path, columns=[subject]) if subject else None
    if frame is None or subject not in frame.columns:
        raise DataError(f"column '{clip(subject)}' (subject) is not in partition {clip(path)}",
                        column=subject)
    text = subject_text(frame[subject])
    return np.unique(text[text != ""].astype(str))


def check_subjects_disjoint(files, subjects_per_file) -> None:
    """Raise DataError naming a subject found in two partitions (and the two partitions)."""
    names = np.concatenate([np.asarray(s, dtype=str) for s in subjects_per_file]) \
        if len(subjects_per_file) else np.empty(0, dtype=str)
    owner = np.concatenate([np.full(len(s), i, dtype=np.int64)
                            for i, s in enumerate(subjects_per_file)]) \
        if len(subjects_per_file) else np.empty(0, dtype=np.int64)
    if names.size == 0:
        return
    order = np.argsort(names, kind="stable")
    sn, so = names[order], owner[order]
    same = np.flatnonzero(sn[1:] == sn[:-1])
    if same.size:
        k = same[0]
        n_dup = int(np.unique(sn[same]).size)
        raise DataError(
            f"subject {clip(sn[k])} is in two partitions, {clip(files[so[k]])} and "
            f"{clip(files[so[k + 1]])} ({n_dup:,} subject(s) straddle partitions in all); every "
            "row of a subject must be in one partition: rewrite the table with "
            "'cohortlens partition DATA --subject COL --out DIR'")
