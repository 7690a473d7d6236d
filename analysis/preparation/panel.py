"""Group-sorted long arrays: the shape every vectorised estimator works on.

Rows are sorted by subject, then by time. Subject ``k`` owns rows
``starts[k] : starts[k] + counts[k]``. Estimators use ``np.add.reduceat`` over
``starts``, ``np.bincount`` over ``codes``, or group subjects by visit count,
instead of looping over subjects in Python.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True, eq=False)
class Panel:
    """Long-format repeated measures, sorted by subject then time.

    Attributes
    ----------
    codes : int64 array (n_obs,)
        Subject index of each row, 0..n_subjects-1, non-decreasing.
    time : float64 array (n_obs,)
        Time since origin, non-decreasing within each subject.
    y : float64 array (n_obs,)
        Response (or residual) values.
    starts, counts : int64 arrays (n_subjects,)
        First row and number of rows of each subject.
    """

    codes: np.ndarray
    time: np.ndarray
    y: np.ndarray
    starts: np.ndarray
    counts: np.ndarray

    @property
    def n_subjects(self) -> int:
        return int(self.counts.size)

    @property
    def n_obs(self) -> int:
        return int(self.y.size)

    @classmethod
    def from_arrays(cls, subject, time, y) -> "Panel":
        """Build a panel from unsorted arrays; subject labels may be anything hashable.

        Subjects are numbered in order of first appearance after sorting by label.
        """
        subject = np.asarray(subject)
        time = np.asarray(time, dtype=float)
        y = np.asarray(y, dtype=float)
        if not (subject.shape == time.shape == y.shape) or subject.ndim != 1:
            raise ValueError("subject, time and y must be 1-D arrays of the same length")
        _, codes = np.unique(subject, return_inverse=True)
        return cls.from_codes(codes.astype(np.int64), time, y)

    @classmethod
    def from_codes(cls, codes, time, y) -> "Panel":
        """Build a panel from integer subject codes 0..m-1 (all present), any row order."""
        codes = np.asarray(codes, dtype=np.int64)
        time = np.asarray(time, dtype=float)
        y = np.asarray(y, dtype=float)
        dc = np.diff(codes)
        presorted = bool(np.all((dc > 0) | ((dc == 0) & (np.diff(time) >= 0))))
        if not presorted:
            order = np.lexsort((time, codes))
            codes, time, y = codes[order], time[order], y[order]
        counts = np.bincount(codes).astype(np.int64)
        if counts.size and counts.min() == 0:
            raise ValueError("subject codes must run 0..m-1 with every subject present")
        starts = np.concatenate(([0], np.cumsum(counts)[:-1])).astype(np.int64)
        return cls(codes, time, y, starts, counts)

    def with_y(self, y) -> "Panel":
        """Same subjects and times, another response (e.g. residuals), in panel row order."""
        y = np.asarray(y, dtype=float)
        if y.shape != self.y.shape:
            raise ValueError("replacement response has the wrong length")
        return Panel(self.codes, self.time, y, self.starts, self.counts)

    def subset_subjects(self, keep: np.ndarray) -> "Panel":
        """Keep subjects where boolean ``keep`` (n_subjects,) is true; renumber them."""
        keep = np.asarray(keep, dtype=bool)
        rows = keep[self.codes]
        new_code = np.cumsum(keep) - 1
        return Panel(
            new_code[self.codes[rows]].astype(np.int64),
            self.time[rows],
            self.y[rows],
            *_starts_counts(self.counts[keep]),
        )


def _starts_counts(counts: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    counts = np.asarray(counts, dtype=np.int64)
    starts = np.concatenate(([0], np.cumsum(counts)[:-1])).astype(np.int64)
    return starts, counts
