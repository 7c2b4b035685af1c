"""Bounded-memory sort of a scan's points into Hilbert-ordered row groups.

Chunks arrive once, as an iterator of records (see rows.py: one structured array per chunk, so
a row moves as one copy of its bytes). While they fit the memory budget they stay in memory; past
it, every chunk is sorted by key and appended to spill files (keys, arrival indices, records), and
a histogram of fine key prefixes is kept. After the last chunk, the histogram cuts the key range
into buckets that each fit the budget; a bucket's rows form one contiguous segment of every
sorted chunk, so it is read back with one seek per chunk and file. Both paths end in the same code
(`_emit_groups`), so the file does not depend on which was taken.

Order: rows are sorted by (key, arrival index); each row group takes the next `row_group_size`
rows of that order, so its rows are one contiguous Hilbert range; inside the group the rows are
put back in arrival (scan) order, which keeps neighbouring values close for delta encoding.
"""

from __future__ import annotations

import os
import shutil
import tempfile
from collections.abc import Iterable, Iterator
from dataclasses import dataclass

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from .hilbert import SiteGrid
from .rows import RowCodec, Rows, numeric_array, table_rows

HIST_BITS = 20  # fine key prefix used to cut buckets: ~1e6 bins over the site
BIN_BITS = 20  # bins per bucket when assigning rows to row groups
KEY_BYTES = 4  # a row's Hilbert key while held (uint32 up to grid order 16)
SORT_OVERHEAD = 24  # bytes per row beyond the record and key while a bucket is grouped (measured: peak RSS of a 20M-point migrate)
SPILL_SORT_OVERHEAD = 100  # the same for spill buckets, which are also put in arrival order (measured: peak RSS of a 20M-point migrate)
SAMPLE = 4096  # spill runs keep every SAMPLE-th key in memory


@dataclass
class Part:
    """Rows: keys and records; `rows` (arrival index) is set where the order is not arrival order
    (spill buckets). Records are held as opaque fixed-size bytes (numpy void): gathering those is
    a plain copy per row, 3-7x faster than gathering a structured array field by field."""

    keys: np.ndarray
    records: np.ndarray
    rows: np.ndarray | None = None

    def __len__(self) -> int:
        return len(self.keys)


class _MemoryStore:
    """Chunks kept as they arrived, while they fit the budget: one bucket."""

    def __init__(self, itemsize: int):
        self.itemsize = itemsize
        self.parts: list[Part] = []
        self.count = 0

    def add(self, part: Part) -> None:
        self.parts.append(part)
        self.count += len(part)

    def nbytes(self) -> int:
        return self.count * (self.itemsize + KEY_BYTES + SORT_OVERHEAD)

    def buckets(self, budget: int) -> Iterator[list[Part]]:
        parts, self.parts = self.parts, []
        yield parts


class _SpillStore:
    """Sorted runs, one per chunk, appended to three files in `directory`: keys, arrival indices
    and records."""

    def __init__(self, dtype: np.dtype, directory: str, key_dtype: np.dtype, key_bits: int):
        self.dtype = dtype
        self.directory = directory
        self.key_dtype = key_dtype
        self.hist_shift = max(0, key_bits - HIST_BITS)
        self.hist = np.zeros(1 << min(key_bits, HIST_BITS), dtype=np.int64)
        self.runs: list[tuple[int, int]] = []  # (first row in the files, length)
        self.samples: list[np.ndarray] = []  # every SAMPLE-th key of each run, to find segments
        self.files = {name: open(os.path.join(directory, f"{name}.bin"), "w+b") for name in ("key", "row", "record")}
        self.count = 0

    def add(self, part: Part, first_row: int) -> None:
        order = _stable_order(part.keys)
        keys = part.keys[order]
        self.hist += np.bincount((keys >> self.hist_shift).astype(np.intp), minlength=self.hist.size)
        self._write("key", keys.astype(self.key_dtype, copy=False))
        self._write("row", order.astype(np.int64) + first_row)
        self._write("record", part.records[order])
        self.runs.append((self.count, len(keys)))
        self.samples.append(keys[::SAMPLE].astype(self.key_dtype))
        self.count += len(keys)

    def _write(self, name: str, array: np.ndarray) -> None:
        self.files[name].write(np.ascontiguousarray(array).data)

    def _read(self, name: str, dtype: np.dtype, segments: list[tuple[int, int]], total: int) -> np.ndarray:
        out = np.empty(total, dtype=dtype)
        view = memoryview(out.view(np.uint8))
        f = self.files[name]
        pos = 0
        for start, length in segments:
            f.seek(start * dtype.itemsize)
            nbytes = length * dtype.itemsize
            if f.readinto(view[pos : pos + nbytes]) != nbytes:
                raise OSError(f"spill file {f.name} is shorter than written; is {self.directory} full?")
            pos += nbytes
        return out

    def buckets(self, budget: int) -> Iterator[list[Part]]:
        """Key ranges cut from the histogram so each bucket fits `budget`; each run gives one segment."""
        for f in self.files.values():
            f.flush()
        if not self.count:
            return
        target = max(1, budget // (self.dtype.itemsize + KEY_BYTES + 8 + SPILL_SORT_OVERHEAD))
        for lo, hi in _cut(self.hist, target):
            segments = []
            for run, sample in zip(self.runs, self.samples):
                a = self._search(run, sample, lo << self.hist_shift)
                b = self._search(run, sample, hi << self.hist_shift) if hi < self.hist.size else run[1]
                if b > a:
                    segments.append((run[0] + a, b - a))
            total = sum(n for _, n in segments)
            if total:
                yield [Part(
                    self._read("key", self.key_dtype, segments, total),
                    self._read("record", self.dtype, segments, total),
                    self._read("row", np.dtype(np.int64), segments, total),
                )]

    def _search(self, run: tuple[int, int], sample: np.ndarray, key: int) -> int:
        """First row of a sorted run with a key >= `key`: narrow with the sample, then read a window.

        Reading beats mapping the key file: mapped pages would count towards the process's memory
        and grow with the scan.
        """
        start, length = run
        i = int(sample.searchsorted(self.key_dtype.type(key)))
        lo = max(0, (i - 1) * SAMPLE)
        hi = min(length, i * SAMPLE + 1)
        window = self._read("key", self.key_dtype, [(start + lo, hi - lo)], hi - lo)
        return lo + int(window.searchsorted(self.key_dtype.type(key)))

    def close(self) -> None:
        for f in self.files.values():
            f.close()


def _cut(hist: np.ndarray, target: int) -> list[tuple[int, int]]:
    """Cut histogram bins into consecutive ranges [lo, hi) of at most `target` rows (or one bin)."""
    cum = np.cumsum(hist)
    cuts, done = [0], 0
    while True:
        nxt = max(int(np.searchsorted(cum, done + target, side="right")), cuts[-1] + 1)
        if nxt >= hist.size:
            break
        cuts.append(nxt)
        done = int(cum[nxt - 1])
    cuts.append(hist.size)
    return list(zip(cuts[:-1], cuts[1:]))


def _stable_order(keys: np.ndarray) -> np.ndarray:
    """Stable argsort of non-negative integer keys (ties keep their positions)."""
    return _radix_order(keys, int(keys.max()).bit_length() if len(keys) else 0)


def _radix_order(values: np.ndarray, bits: int) -> np.ndarray:
    """Stable argsort of non-negative integers below 2^bits: least-significant-digit passes of
    numpy's radix sort on 16-bit digits, O(n) each. On scan keys two passes for 32 bits take half
    the time of sorting (key << b | position) packed into one uint64."""
    passes = max(1, -(-bits // 16))
    width = -(-max(bits, 1) // passes)
    order: np.ndarray | None = None
    for i in range(passes):
        digit = ((values >> (i * width)) & ((1 << width) - 1)).astype(np.uint16)
        step = np.argsort(digit if order is None else digit[order], kind="stable")
        del digit
        order = step if order is None else order[step]
    assert order is not None
    return order


def _group_of_rows(parts: list[Part], size: int) -> np.ndarray:
    """Row group number (rank // size in (key, position) order) of every row, without a full sort.

    Keys are binned into at most 2^20 bins; a bin whose rank range lies inside one group gives all
    its rows that group. The rows of the few bins that straddle a group boundary are counted again,
    finer (`_straddling_groups`). Counting-sorting rows by group (arrow's stable sort) then gives
    each group's rows in position order.
    """
    kmin = min(int(p.keys.min()) for p in parts if len(p))
    kmax = max(int(p.keys.max()) for p in parts if len(p))
    shift = max(0, (kmax - kmin).bit_length() - BIN_BITS)
    count = np.zeros(((kmax - kmin) >> shift) + 1, np.int64)
    for bins in _bins_of_parts(parts, kmin, shift):
        count += np.bincount(bins, minlength=len(count))
    before = np.cumsum(count) - count
    first, straddle = _groups_of_bins(before, count, size)
    dtype = np.uint16 if (before[-1] + count[-1]) // size < 2**16 - 2 else np.uint32
    mark = np.iinfo(dtype).max  # straddling bins: one gather gives groups and marks
    marked = np.where(straddle, mark, first).astype(dtype)
    group = np.empty(sum(len(p) for p in parts), dtype)
    starts = np.cumsum([0] + [len(p) for p in parts])
    views = [group[a:b] for a, b in zip(starts[:-1], starts[1:])]  # each part's rows
    for view, bins in zip(views, _bins_of_parts(parts, kmin, shift)):
        np.take(marked, bins, out=view)
    # the straddling rows' keys, in position order, in one array of the keys' own unsigned type
    # (half the bytes of int64); their positions stay per part (fresh memory costs: see DEVELOPERS.md)
    hits = [np.flatnonzero(v == mark) for v in views]
    ends = np.cumsum([0] + [len(h) for h in hits])
    if ends[-1]:
        rel = np.empty(ends[-1], np.result_type(*(p.keys.dtype for p in parts)))
        for p, h, a, b in zip(parts, hits, ends, ends[1:]):
            np.take(p.keys, h, out=rel[a:b])
        rel -= rel.dtype.type(kmin)
        found = _straddling_groups(rel, shift, before, straddle, size, dtype)
        del rel
        for v, h, a, b in zip(views, hits, ends, ends[1:]):
            v[h] = found[a:b]
    return group


def _bins_of_parts(parts: list[Part], kmin: int, shift: int) -> Iterator[np.ndarray]:
    """Bin numbers ``(key - kmin) >> shift`` of each part's rows, as the platform integers that
    bincount and take index with, in one scratch array that the next part overwrites: binning
    20M rows then takes no fresh memory beyond one part (fresh pages cost the kernel more than
    the arithmetic on them)."""
    scratch = np.empty(max(len(p) for p in parts), np.intp)
    for p in parts:
        bins = scratch[: len(p)]
        np.copyto(bins, p.keys, casting="unsafe")  # keys < 2^62 (SiteGrid order <= 31): no wrap-around
        np.subtract(bins, kmin, out=bins)
        np.right_shift(bins, shift, out=bins)
        yield bins


def _groups_of_bins(before: np.ndarray, count: np.ndarray, size: int) -> tuple[np.ndarray, np.ndarray]:
    """Group of each bin's first row, and whether the bin's rows fall into more than one group."""
    first = before // size
    return first, (count > 0) & (first != (before + count - 1) // size)


def _straddling_groups(rel: np.ndarray, shift: int, before: np.ndarray, straddle: np.ndarray, size: int,
                       dtype: np.dtype) -> np.ndarray:
    """Groups (as ``dtype``) of the rows (keys minus kmin `rel`, in position order) of bins
    `rel >> shift` that straddle a group boundary.

    Each straddling bin is cut into 2^fine sub-bins counted on one histogram of those bins alone,
    so sub-bins are single keys where that histogram stays small (a dense spot, such as the ground
    next to a scanner, can put a million rows into one bin); only the rows of sub-bins that straddle
    a boundary again are sorted, by (key, position).
    """
    bins = np.flatnonzero(straddle)
    fine = min(shift, max(0, BIN_BITS - len(bins).bit_length()))
    ordinal = np.cumsum(straddle, dtype=np.intp) - 1
    bits = rel >> shift  # the bin; then, in the same memory, the sub-bin within it
    sub = ordinal[bits]  # platform integers, as bincount and the gathers below index with
    sub <<= fine
    np.right_shift(rel, shift - fine, out=bits)
    bits &= bits.dtype.type((1 << fine) - 1)
    np.bitwise_or(sub, bits, out=sub, dtype=np.intp, casting="unsafe")  # bits < 2^fine: fits any type
    del bits
    count = np.bincount(sub, minlength=len(bins) << fine).reshape(len(bins), -1)
    before = (np.cumsum(count, axis=1) - count + before[bins][:, None]).ravel()
    count = count.ravel()
    first, again = _groups_of_bins(before, count, size)
    group = first.astype(dtype)[sub]
    hits = np.flatnonzero(again[sub])
    if hits.size:
        order = hits[_stable_order(rel[hits])]  # hits ascend, so ties keep position order
        sorted_sub = sub[order]
        within = np.arange(len(order)) - np.searchsorted(sorted_sub, sorted_sub, side="left")
        group[order] = (before[sorted_sub] + within) // size
    return group


def _gather(parts: list[Part], starts: np.ndarray, idx: np.ndarray, records_only: bool = False) -> Part:
    """Rows at global positions `idx` (any order) of the concatenation of `parts` (without keys
    and arrival indices when `records_only`)."""
    pieces = _pieces(parts, starts, idx)

    def pick(get) -> np.ndarray:
        out = np.empty(len(idx), dtype=get(parts[0]).dtype)
        for p, where, local in pieces:
            if isinstance(where, slice):
                np.take(get(p), local, out=out[where], mode="clip")  # positions are valid: no checks
            else:
                out[where] = get(p)[local]
        return out

    records = pick(lambda p: p.records)
    if records_only:
        return Part(np.empty(0, parts[0].keys.dtype), records)
    return Part(pick(lambda p: p.keys), records, None if any(p.rows is None for p in parts) else pick(lambda p: p.rows))


def _pieces(parts: list[Part], starts: np.ndarray, idx: np.ndarray) -> list[tuple[Part, slice | np.ndarray, np.ndarray]]:
    """(part, where its rows go in the output, their positions in the part) for the rows `idx`.

    A row group in arrival order from a memory bucket is a run of ascending positions, so its rows
    of one part are one slice of the output, found by a binary search of the part starts in the
    run (not of every row in the starts). Otherwise (a spill bucket and its carry, key order) rows
    are assigned to parts one by one: consecutive rows of one part still make one slice, and
    positions that switch parts more often are split by masks.
    """
    if not len(idx):
        return []
    if len(parts) == 1:
        return [(parts[0], slice(0, len(idx)), idx)]
    descents = np.flatnonzero(idx[1:] < idx[:-1]) + 1
    if len(descents) < 4 * len(parts) + 16:
        pieces = []
        edges = [0, *descents.tolist(), len(idx)]
        for a, b in zip(edges[:-1], edges[1:]):
            cuts = [a, *(a + np.searchsorted(idx[a:b], starts[1:-1])).tolist(), b]  # part k: cuts[k]..cuts[k + 1]
            pieces += [(p, slice(lo, hi), idx[lo:hi] - s) for p, s, lo, hi in zip(parts, starts, cuts[:-1], cuts[1:]) if hi > lo]
        return pieces
    which = np.searchsorted(starts[1:-1], idx, side="right")  # part of each row
    cuts = np.flatnonzero(which[1:] != which[:-1]) + 1
    if len(cuts) < 4 * len(parts) + 16:
        runs = zip([0, *cuts.tolist()], [*cuts.tolist(), len(idx)])
        return [(parts[which[a]], slice(a, b), idx[a:b] - starts[which[a]]) for a, b in runs]
    return [(p, sel, idx[sel] - s) for k, (p, s) in enumerate(zip(parts, starts))
            if (sel := np.flatnonzero(which == k)).size]


def _group_order(parts: list[Part], size: int, scan_order: bool) -> np.ndarray:
    """Positions (in the concatenation of `parts`) in file order: consecutive runs of `size` are
    the row groups (ranks in (key, position) order), each in arrival order, or in key order when
    not `scan_order`.

    Among equal keys position order is arrival order in both stores (see `_emit_groups`), so one
    stable sort by key gives key order. For scan order, the group of every row comes from binning
    (`_group_of_rows`); a stable counting sort by group (Arrow's) of the rows taken in arrival order
    then gives every group in arrival order at once: spill buckets are first put in arrival order
    by one radix sort of their arrival indices, memory buckets are in arrival order already.
    """
    if not scan_order:
        return _stable_order(np.concatenate([p.keys for p in parts]) if len(parts) > 1 else parts[0].keys)
    group = _group_of_rows(parts, size)
    if all(p.rows is None for p in parts):
        return pc.array_sort_indices(numeric_array(group)).to_numpy().view(np.int64)
    rows = np.concatenate([p.rows for p in parts])
    rows -= rows.min()
    arrival = _stable_order(rows.astype(np.uint32) if int(rows.max()) < 2**32 else rows)
    del rows
    by_group = pc.array_sort_indices(numeric_array(group[arrival])).to_numpy().view(np.int64)
    return arrival[by_group]


def _emit_groups(
    buckets: Iterable[list[Part]], codec: RowCodec, size: int, scan_order: bool, batch_rows: int,
) -> Iterator[pa.Table]:
    """Cut each bucket into row groups of `size` rows and yield them as tables of whole groups
    (up to `batch_rows` rows each, at least one group); a bucket's last, partial group is carried
    into the next bucket (its keys are all lower), so only the file's last group is short.

    A spill bucket is in file order: runs in arrival order, each sorted by (key, arrival), so among
    equal keys file order is arrival order and ranks need no reordering. The carry stays a
    separate part (no copy of the bucket); its keys are all below the bucket's, so no ties cross
    the two. One permutation per bucket and one gather of records per batch: the cost does not
    grow with the number of row groups or columns.
    """
    per = max(1, batch_rows // size) * size
    carry: Part | None = None
    for parts in buckets:
        parts = [p for p in parts if len(p)]
        if carry is not None and parts:
            parts, carry = [carry, *parts], None
        if not parts:
            continue
        order = _group_order(parts, size, scan_order)
        starts = np.cumsum([0] + [len(p) for p in parts])
        full = len(order) // size * size
        for start in range(0, full, per):
            yield codec.decode(_gather(parts, starts, order[start : min(full, start + per)], records_only=True).records.view(codec.dtype))
        if full < len(order):
            carry = _gather(parts, starts, order[full:])
        parts = order = None  # type: ignore[assignment]  # free this bucket before the next is read
    if carry is not None:
        yield codec.decode(carry.records.view(codec.dtype))


def sorted_row_groups(
    chunks: Iterable[pa.Table] | Rows,
    grid: SiteGrid,
    *,
    row_group_size: int = 262_144,
    memory_budget: int = 512 * 2**20,
    spill_dir: str | None = None,
    scan_order: bool = True,
    batch_rows: int = 1,
) -> Iterator[pa.Table]:
    """Yield the points of `chunks` (tables of one schema, or `Rows`) as tables of whole row groups
    in Hilbert order of (x, y) on `grid`: one row group per table by default, or as many as fit
    `batch_rows` rows (a writer splits them by `row_group_size`; fewer, larger tables cost less
    per row group).

    Memory stays near `memory_budget` whatever the scan's size (each chunk itself must fit).
    Spill files live in a fresh folder under `spill_dir` (default: the system temp folder) and are
    removed when the generator finishes or is closed, also on error.
    """
    if row_group_size < 1:
        raise ValueError(f"row_group_size must be positive, got {row_group_size}")
    rows = chunks if isinstance(chunks, Rows) else table_rows(chunks)
    if rows is None:
        return
    codec = rows.codec
    key_bits = 2 * grid.order
    key_dtype = np.dtype(np.uint32 if key_bits <= 32 else np.uint64)
    void = np.dtype((np.void, codec.dtype.itemsize))
    memory = _MemoryStore(codec.dtype.itemsize)
    spill: _SpillStore | None = None
    tmp: str | None = None
    try:
        count = 0
        for records in rows.chunks:
            part = Part(codec.keys(records, grid).astype(key_dtype, copy=False), np.ascontiguousarray(records).view(void))
            if spill is None:
                memory.add(part)
                if memory.nbytes() > memory_budget:
                    tmp = tempfile.mkdtemp(prefix=".scanshelf-spill-", dir=spill_dir)
                    spill = _SpillStore(void, tmp, key_dtype, key_bits)
                    first_row = 0
                    while memory.parts:
                        held = memory.parts.pop(0)
                        spill.add(held, first_row)
                        first_row += len(held)
            else:
                spill.add(part, count)
            count += len(part)
        store = memory if spill is None else spill
        yield from _emit_groups(store.buckets(memory_budget), codec, row_group_size, scan_order, batch_rows)
    finally:
        if spill is not None:
            spill.close()
        if tmp is not None:
            shutil.rmtree(tmp, ignore_errors=True)
