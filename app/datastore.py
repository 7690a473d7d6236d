"""Server-side home of loaded tables: a bounded LRU keyed by content hash.

Browser stores only ever hold the key. Uploaded bytes are parsed in memory and
kept here (never written to disk); the least recently used upload is dropped
when the bound is reached. The dataset the server was started with (the demo
registry by default) is pinned under a fixed key and loaded on first use.
"""
from __future__ import annotations

import threading
from collections import OrderedDict
from typing import Callable

import pandas as pd

from analysis.errors import DataError
from analysis.preparation.loading import Dataset

#: the fixed key of the bundled demo registry (also what a shared link carries)
DEMO_KEY = "demo"
#: default memory budget (MB) of uploads plus cached results (``cohortlens serve --cache-mb``)
DEFAULT_CACHE_MB = 1024

#: largest HTTP request the server accepts (an upload arrives base64-encoded inside one request)
MAX_REQUEST_BYTES = 200 * 1024 * 1024


def upload_limit(request_bytes: int = MAX_REQUEST_BYTES) -> int:
    """Largest file the page can send within ``request_bytes``: base64 makes 3 bytes 4, and the
    callback's other inputs need a little room (64 KiB kept for them)."""
    return max(0, (request_bytes - 64 * 1024) * 3 // 4)


def size_text(n: int) -> str:
    """'149 MB' (binary megabytes, as file managers mostly show them)."""
    return f"{n / 2**20:,.0f} MB" if n >= 2**20 else f"{n / 1024:,.0f} KB"


#: the name of every stored upload (a session shows the file name from its own browser store)
UPLOAD_NAME = "uploaded table"


class DataStore:
    """Bounded, thread-safe store of :class:`~analysis.preparation.loading.Dataset` objects.

    Parameters
    ----------
    max_uploads : int
        How many uploaded tables to keep; older ones are evicted first.
    max_cells : int
        Upper bound on rows x columns of one upload (larger tables are refused).
    max_bytes : int or None
        Memory budget of the uploads (pandas ``memory_usage(deep=True)``); the least recently
        used go first, the newest is always kept. None: the count bound only.
    """

    def __init__(self, max_uploads: int = 8, max_cells: int = 20_000_000,
                 max_bytes: int | None = None):
        if max_uploads < 1:
            raise ValueError(f"max_uploads == {max_uploads}, must be >= 1")
        if max_bytes is not None and max_bytes < 1:
            raise ValueError(f"max_bytes == {max_bytes}, must be >= 1")
        self.max_uploads = max_uploads
        self.max_cells = max_cells
        self.max_bytes = max_bytes
        self.nbytes = 0
        self._sizes: dict[str, int] = {}
        self._uploads: OrderedDict[str, Dataset] = OrderedDict()
        self._pinned: dict[str, Dataset | Callable[[], Dataset]] = {}
        self._lock = threading.Lock()

    # -- pinned (start-up) data -------------------------------------------
    def pin(self, key: str, source: Dataset | Callable[[], Dataset]) -> str:
        """Keep a dataset (or a zero-argument loader for it) under ``key`` forever."""
        with self._lock:
            self._pinned[key] = source
        return key

    # -- uploads ------------------------------------------------------------
    def add(self, frame: pd.DataFrame, *, name: str = "upload") -> Dataset:
        """Store a table under its content hash and return the dataset (same content, same key).

        ``name`` is used in messages only: the stored dataset is shared by every session that
        uploads the same content, so it keeps the neutral :data:`UPLOAD_NAME` and each session
        keeps its own file name in its browser store.
        """
        if frame.size > self.max_cells:
            raise DataError(
                f"{name} has {frame.shape[0]:,} rows x {frame.shape[1]} columns; this server "
                f"accepts at most {self.max_cells:,} cells per table (drop unused columns first)")
        # rows are numbered from 0 in file order (messages count spreadsheet rows from it,
        # and the selection step expects it); a filtered frame keeps its old labels otherwise
        frame = frame.reset_index(drop=True)
        dataset = Dataset.from_frame(frame, name=UPLOAD_NAME)
        size = int(frame.memory_usage(deep=True, index=True).sum())
        with self._lock:
            if dataset.key in self._uploads:
                self._uploads.move_to_end(dataset.key)
                return self._uploads[dataset.key]
            self._uploads[dataset.key] = dataset
            self._sizes[dataset.key] = size
            self.nbytes += size
            while len(self._uploads) > 1 and (
                    len(self._uploads) > self.max_uploads
                    or (self.max_bytes is not None and self.nbytes > self.max_bytes)):
                old, _ = self._uploads.popitem(last=False)
                self.nbytes -= self._sizes.pop(old, 0)
        return dataset

    def get(self, key: str | None) -> Dataset | None:
        """The dataset under ``key``, or None if the server does not hold it (any more)."""
        if not key:
            return None
        with self._lock:
            if key in self._uploads:
                self._uploads.move_to_end(key)
                return self._uploads[key]
            source = self._pinned.get(key)
        if source is None:
            return None
        if callable(source):
            loaded = source()
            with self._lock:
                self._pinned[key] = loaded
            return loaded
        return source

    def __contains__(self, key: str) -> bool:
        with self._lock:
            return key in self._uploads or key in self._pinned

    def __len__(self) -> int:
        with self._lock:
            return len(self._uploads)


def demo_dataset() -> Dataset:
    """The bundled invented registry as a dataset with the fixed key :data:`DEMO_KEY`."""
    from analysis.preparation.demo import load_demo

    return Dataset(DEMO_KEY, load_demo(), "Kidney transplant registry (invented demo)")
