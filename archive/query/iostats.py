"""Count what a query cost: requests made and bytes fetched through fsspec.

Remote subsetting is only worth it when it fetches little, so every read the query layer makes
goes through :class:`CountingFileSystem`, a directory-rooted fsspec wrapper that tallies calls
into one shared :class:`IOStats`. The counts are the client's view (one ``cat_ranges`` range =
one request); a server's access log remains the ground truth and the tests compare the two.
"""

from __future__ import annotations

import threading
from dataclasses import dataclass, field
from typing import Any

import fsspec
from fsspec.implementations.dirfs import DirFileSystem


@dataclass
class IOStats:
    """Running totals of requests and bytes, safe to update from several threads."""

    requests: int = 0
    bytes: int = 0
    _lock: threading.Lock = field(default_factory=threading.Lock, repr=False, compare=False)

    def add(self, requests: int, nbytes: int) -> None:
        with self._lock:
            self.requests += requests
            self.bytes += nbytes

    def snapshot(self) -> IOStats:
        with self._lock:
            return IOStats(self.requests, self.bytes)

    def reset(self) -> None:
        with self._lock:
            self.requests = 0
            self.bytes = 0

    def __sub__(self, other: IOStats) -> IOStats:
        return IOStats(self.requests - other.requests, self.bytes - other.bytes)

    def __str__(self) -> str:
        return f"{self.requests} requests, {self.bytes:,} bytes fetched"

    def __getstate__(self) -> dict:
        return {"requests": self.requests, "bytes": self.bytes}

    def __setstate__(self, state: dict) -> None:
        self.requests, self.bytes = state["requests"], state["bytes"]
        self._lock = threading.Lock()


def _size(data: Any) -> int:
    return len(data) if isinstance(data, (bytes, bytearray, memoryview)) else 0


class CountingFileSystem(DirFileSystem):
    """Paths relative to a shelf root; every read is added to ``stats``."""

    protocol = "scanshelf-counting"
    cachable = False  # each Shelf keeps its own counts

    def __init__(self, path: str, fs: fsspec.AbstractFileSystem, stats: IOStats, **kwargs: Any):
        super().__init__(path=path, fs=fs, **kwargs)
        self.stats = stats
        self.tail_hint = 64 * 1024  # bytes a tail (footer) read takes; readers raise it as they learn

    # whole or ranged reads of one object: one request each
    def cat_file(self, path, *args, **kwargs):
        data = super().cat_file(path, *args, **kwargs)
        self.stats.add(1, _size(data))
        return data

    async def _cat_file(self, path, *args, **kwargs):
        data = await super()._cat_file(path, *args, **kwargs)
        self.stats.add(1, _size(data))
        return data

    def cat_ranges(self, paths, starts, ends, *args, **kwargs):
        out = super().cat_ranges(paths, starts, ends, *args, **kwargs)
        self.stats.add(len(out), sum(_size(d) for d in out))
        return out

    async def _cat_ranges(self, paths, starts, ends, *args, **kwargs):
        out = await super()._cat_ranges(paths, starts, ends, *args, **kwargs)
        self.stats.add(len(out), sum(_size(d) for d in out))
        return out

    # metadata probes: one request each on HTTP and object stores
    def info(self, path, **kwargs):
        self.stats.add(1, 0)
        return super().info(path, **kwargs)

    async def _info(self, path, **kwargs):
        self.stats.add(1, 0)
        return await super()._info(path, **kwargs)

    def exists(self, path):
        self.stats.add(1, 0)
        return super().exists(path)

    async def _exists(self, path):
        self.stats.add(1, 0)
        return await super()._exists(path)

    def open(self, path, *args, **kwargs):
        f = super().open(path, *args, **kwargs)
        fetch = getattr(f, "_fetch_range", None)
        if fetch is not None:
            stats = self.stats

            def counted(start: int, end: int) -> bytes:
                data = fetch(start, end)
                stats.add(1, _size(data))
                return data

            f._fetch_range = counted
        return f
