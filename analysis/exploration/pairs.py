"""Within-subject pairs of observations, enumerated without a loop over subjects.

Subjects are grouped by their number of visits ``n``. For one group of ``m``
subjects the rows form an ``(m, n)`` array ``starts[:, None] + arange(n)``;
``np.triu_indices(n, 1)`` is taken once and applied to every row of that array,
giving all ``m * n (n - 1) / 2`` pairs of the group in one step. The only
Python loop is over distinct visit counts (and over chunks of a large group,
so that memory stays bounded).
"""
from __future__ import annotations

from typing import Iterator

import numpy as np

#: default upper bound on the number of pairs produced in one chunk
DEFAULT_CHUNK_PAIRS = 2_000_000


def n_within_pairs(counts) -> int:
    """Number of within-subject pairs, ``sum_i n_i (n_i - 1) / 2``.

    Parameters
    ----------
    counts : int array (n_subjects,)
        Visits per subject.

    Returns
    -------
    int
    """
    c = np.asarray(counts, dtype=np.int64)
    return int(np.sum(c * (c - 1) // 2))


def iter_pair_chunks(starts, counts, *, max_pairs: int = DEFAULT_CHUNK_PAIRS
                     ) -> Iterator[tuple[np.ndarray, np.ndarray]]:
    """Yield row indices ``(first, second)`` of within-subject pairs, chunk by chunk.

    Parameters
    ----------
    starts, counts : int arrays (n_subjects,)
        First row and number of rows of each subject in a group-sorted panel
        (see :class:`analysis.preparation.panel.Panel`).
    max_pairs : int, keyword-only
        Upper bound on the pairs in one chunk (a single subject's pairs are
        never split, so a chunk holds at least one subject).

    Yields
    ------
    first, second : int64 arrays (k,)
        Row positions with ``first < second`` and both rows in the same subject.

    Notes
    -----
    Order is deterministic: by visit count ascending, then subject number
    ascending, then ``np.triu_indices`` order within a subject. Concatenated
    over all chunks the pairs number :func:`n_within_pairs` ``(counts)``, and
    each unordered within-subject pair appears exactly once.
    """
    if max_pairs < 1:
        raise ValueError(f"max_pairs == {max_pairs}, must be >= 1")
    starts = np.asarray(starts, dtype=np.int64)
    counts = np.asarray(counts, dtype=np.int64)
    order = np.argsort(counts, kind="stable")
    sorted_counts = counts[order]
    distinct, first_pos = np.unique(sorted_counts, return_index=True)
    bounds = np.append(first_pos, sorted_counts.size)
    for g, n in enumerate(distinct):
        n = int(n)
        if n < 2:
            continue
        group_starts = starts[order[bounds[g]:bounds[g + 1]]]
        a, b = np.triu_indices(n, 1)
        step = max(1, max_pairs // a.size)
        for lo in range(0, group_starts.size, step):
            s = group_starts[lo:lo + step, None]
            yield (s + a).ravel(), (s + b).ravel()


def within_pair_rows(starts, counts) -> tuple[np.ndarray, np.ndarray]:
    """All within-subject pairs at once: ``(first, second)`` row indices.

    Parameters
    ----------
    starts, counts : int arrays (n_subjects,)

    Returns
    -------
    first, second : int64 arrays (n_within_pairs(counts),)
        Same order as :func:`iter_pair_chunks`.
    """
    chunks = list(iter_pair_chunks(starts, counts, max_pairs=np.iinfo(np.int64).max))
    if not chunks:
        empty = np.zeros(0, dtype=np.int64)
        return empty, empty.copy()
    return (np.concatenate([c[0] for c in chunks]),
            np.concatenate([c[1] for c in chunks]))
