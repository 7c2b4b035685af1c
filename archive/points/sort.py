"""Bounded-memory sort of a scan's points into Hilbert-ordered row groups.

Chunks arrive once, as an iterator. While they fit the memory budget they stay in memory; past
it, every chunk is sorted by key and appended to one spill file per column, and a histogram of
fine key prefixes is kept. After the last chunk, the histogram cuts the key range into buckets
that each fit the budget; a bucket's rows form one contiguous segment of every sorted chunk, so
it is read back with one seek per chunk and column. Both paths end in the same code
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

from .coords import decimal_from_units, units_of
from .hilbert import SiteGrid

COORDS = ("x", "y", "z")
HIST_BITS = 20  # fine key prefix used to cut buckets: ~1e6 bins over the site
SORT_OVERHEAD = 40  # bytes per row beyond the column data while a bucket is sorted


@dataclass(frozen=True)
class _Column:
    """How one Arrow column is held as a flat numpy array while sorting."""

    name: str
    type: pa.DataType
    dtype: np.dtype
    kind: str  # "units" (x, y, z decimals as int64), "bool" (as uint8), "fixed" (raw value bytes)

    @classmethod
    def of(cls, field: pa.Field) -> "_Column":
        t = field.type
        if field.name in COORDS:
            if not pa.types.is_decimal(t) or t.precision > 18:
                raise TypeError(f"column {field.name!r} must be decimal128(18, k) from coords.py, got {t}")
            return cls(field.name, t, np.dtype(np.int64), "units")
        if pa.types.is_boolean(t):
            return cls(field.name, t, np.dtype(np.uint8), "bool")
        width = getattr(t, "bit_width", 0)
        if not pa.types.is_primitive(t) and not pa.types.is_decimal(t) or width % 8 or width == 0:
            raise TypeError(
                f"column {field.name!r} has type {t}, which is not fixed-width; cast it to a numeric type "
                "before writing points"
            )
        if pa.types.is_integer(t) or pa.types.is_floating(t):
            return cls(field.name, t, np.dtype(t.to_pandas_dtype()), "fixed")
        nbytes = width // 8
        dtype = np.dtype({1: np.uint8, 2: np.uint16, 4: np.uint32, 8: np.uint64}.get(nbytes, f"V{nbytes}"))
        return cls(field.name, t, dtype, "fixed")

    def to_numpy(self, array: pa.Array) -> tuple[np.ndarray, np.ndarray | None]:
        """Values and validity (None when no nulls)."""
        if self.kind == "units":
            return units_of(array), None
        valid = array.is_valid().to_numpy(zero_copy_only=False).astype(np.uint8) if array.null_count else None
        if self.kind == "bool":
            return array.fill_null(False).to_numpy(zero_copy_only=False).astype(np.uint8), valid
        values = np.frombuffer(array.buffers()[1], dtype=self.dtype, count=array.offset + len(array))
        return values[array.offset :], valid

    def to_arrow(self, values: np.ndarray, valid: np.ndarray | None) -> pa.Array:
        if self.kind == "units":
            return decimal_from_units(values, self.type.scale)
        mask = None if valid is None else pa.py_buffer(np.packbits(valid.astype(bool), bitorder="little"))
        nulls = -1 if valid is not None else 0
        if self.kind == "bool":
            bits = pa.py_buffer(np.packbits(values.astype(bool), bitorder="little"))
            return pa.Array.from_buffers(self.type, len(values), [mask, bits], null_count=nulls)
        data = pa.py_buffer(np.ascontiguousarray(values))
        return pa.Array.from_buffers(self.type, len(values), [mask, data], null_count=nulls)


@dataclass
class Bucket:
    """Rows of one key range (any order): keys, arrival index, column values and validity."""

    keys: np.ndarray
    rows: np.ndarray
    values: dict[str, np.ndarray]
    valid: dict[str, np.ndarray]


class _Store:
    """Collects rows; `buckets()` gives them back as ascending, disjoint key ranges."""

    def __init__(self, columns: list[_Column]):
        self.columns = columns
        self.count = 0
        self.nullable: set[str] = set()

    def row_bytes(self) -> int:
        return sum(c.dtype.itemsize for c in self.columns) + len(self.nullable) + 16


class _MemoryStore(_Store):
    def __init__(self, columns: list[_Column]):
        super().__init__(columns)
        self.parts: list[tuple[np.ndarray, dict, dict]] = []

    def add(self, keys: np.ndarray, values: dict, valid: dict) -> None:
        self.parts.append((keys, values, valid))
        self.nullable |= set(valid)
        self.count += len(keys)

    def nbytes(self) -> int:
        return self.count * (self.row_bytes() + SORT_OVERHEAD)

    def drain(self) -> Iterator[tuple[np.ndarray, dict, dict]]:
        """Hand the parts over one by one, freeing each (used when switching to the spill store)."""
        while self.parts:
            yield self.parts.pop(0)

    def buckets(self, budget: int) -> Iterator[Bucket]:
        parts, self.parts = self.parts, []
        if not parts:
            return
        keys = np.concatenate([p[0] for p in parts])
        # one column at a time, dropping its parts, so the copy never doubles the whole scan
        values = {c.name: np.concatenate([p[1].pop(c.name) for p in parts]) for c in self.columns}
        valid = {
            name: np.concatenate([p[2].pop(name, None) if name in p[2] else np.ones(len(p[0]), np.uint8) for p in parts])
            for name in self.nullable
        }
        del parts
        yield Bucket(keys, np.arange(len(keys), dtype=np.int64), values, valid)


class _SpillStore(_Store):
    """Sorted runs, one per chunk, appended to one file per column."""

    def __init__(self, columns: list[_Column], directory: str, key_dtype: np.dtype, key_bits: int):
        super().__init__(columns)
        self.directory = directory
        self.key_dtype = key_dtype
        self.hist_shift = max(0, key_bits - HIST_BITS)
        self.hist = np.zeros(1 << min(key_bits, HIST_BITS), dtype=np.int64)
        self.runs: list[tuple[int, int]] = []  # (first row in files, length)
        self.files: dict[str, object] = {}
        for name, dtype in self._streams():
            self._open(name)

    def _streams(self) -> list[tuple[str, np.dtype]]:
        streams = [("__key", self.key_dtype), ("__row", np.dtype(np.int64))]
        streams += [(c.name, c.dtype) for c in self.columns]
        return streams + [(f"__valid.{n}", np.dtype(np.uint8)) for n in sorted(self.nullable)]

    def _path(self, name: str) -> str:
        return os.path.join(self.directory, f"{len(self.files):03d}.bin")

    def _open(self, name: str) -> None:
        self.files[name] = open(self._path(name), "w+b")

    def add(self, keys: np.ndarray, values: dict, valid: dict, rows: np.ndarray) -> None:
        for name in set(valid) - self.nullable:  # first nulls in this column: earlier rows were valid
            self.nullable.add(name)
            self._open(f"__valid.{name}")
            ones = np.ones(1 << 20, np.uint8)
            for start in range(0, self.count, ones.size):
                self.files[f"__valid.{name}"].write(ones[: min(ones.size, self.count - start)].data)
        order = _packed_order(keys)
        keys = keys[order]
        self.hist += np.bincount((keys >> self.hist_shift).astype(np.int64), minlength=self.hist.size)
        self._write("__key", keys.astype(self.key_dtype, copy=False))
        self._write("__row", rows[order])
        for c in self.columns:
            self._write(c.name, values[c.name][order])
        for name in self.nullable:
            v = valid.get(name)
            self._write(f"__valid.{name}", np.ones(len(keys), np.uint8) if v is None else v[order])
        self.runs.append((self.count, len(keys)))
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

    def buckets(self, budget: int) -> Iterator[Bucket]:
        for f in self.files.values():
            f.flush()
        keys_map = np.memmap(self.files["__key"].name, dtype=self.key_dtype, mode="r") if self.count else None
        target = max(1, budget // (self.row_bytes() + SORT_OVERHEAD))
        for lo, hi in _cut(self.hist, target):
            klo, khi = lo << self.hist_shift, hi << self.hist_shift
            segments = []
            for start, length in self.runs:
                run = keys_map[start : start + length]
                a, b = np.searchsorted(run, [klo, khi]) if hi < self.hist.size else (np.searchsorted(run, klo), length)
                if b > a:
                    segments.append((start + int(a), int(b - a)))
            total = sum(n for _, n in segments)
            if not total:
                continue
            yield Bucket(
                self._read("__key", self.key_dtype, segments, total).astype(np.uint64),
                self._read("__row", np.dtype(np.int64), segments, total),
                {c.name: self._read(c.name, c.dtype, segments, total) for c in self.columns},
                {n: self._read(f"__valid.{n}", np.dtype(np.uint8), segments, total) for n in self.nullable},
            )
        del keys_map

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


def _packed_order(keys: np.ndarray) -> np.ndarray:
    """Stable argsort of keys: sort (key << b | position) as one uint64, which is several times
    faster than np.argsort; falls back to a stable argsort when the key is too wide to pack."""
    n = len(keys)
    bits = max(1, int(n - 1).bit_length())
    if n and int(keys.max()).bit_length() + bits <= 64:
        packed = (keys.astype(np.uint64) << np.uint64(bits)) | np.arange(n, dtype=np.uint64)
        packed.sort()
        packed &= np.uint64((1 << bits) - 1)
        return packed.astype(np.int64)
    return np.argsort(keys, kind="stable")


def _emit_groups(buckets: Iterable[Bucket], columns: list[_Column], nullable: set[str], row_group_size: int, scan_order: bool) -> Iterator[pa.Table]:
    """Sort each bucket and cut row groups; the tail of a bucket is carried into the next one."""
    carry: Bucket | None = None
    schema = pa.schema([pa.field(c.name, c.type) for c in columns])
    for bucket in buckets:
        if carry is not None:
            bucket = _concat(carry, bucket, nullable)
        order = _packed_order(bucket.keys)
        n = len(order)
        full = n - n % row_group_size
        for start in range(0, full, row_group_size):
            yield _gather(bucket, order[start : start + row_group_size], columns, nullable, schema, scan_order)
        rest = order[full:]
        carry = _take(bucket, np.sort(rest), nullable) if len(rest) else None
    if carry is not None:
        yield _gather(carry, _packed_order(carry.keys), columns, nullable, schema, scan_order)


def _concat(a: Bucket, b: Bucket, nullable: set[str]) -> Bucket:
    return Bucket(
        np.concatenate([a.keys, b.keys]),
        np.concatenate([a.rows, b.rows]),
        {k: np.concatenate([a.values[k], b.values[k]]) for k in b.values},
        {k: np.concatenate([a.valid.get(k, np.ones(len(a.keys), np.uint8)), b.valid[k]]) for k in nullable},
    )


def _take(b: Bucket, idx: np.ndarray, nullable: set[str]) -> Bucket:
    return Bucket(b.keys[idx], b.rows[idx], {k: v[idx] for k, v in b.values.items()}, {k: b.valid[k][idx] for k in nullable})


def _gather(b: Bucket, idx: np.ndarray, columns: list[_Column], nullable: set[str], schema: pa.Schema, scan_order: bool) -> pa.Table:
    if scan_order:  # same rows, arrival order: sort by the (unique) arrival index
        idx = idx[_packed_order(b.rows[idx])]
    arrays = [c.to_arrow(b.values[c.name][idx], b.valid[c.name][idx] if c.name in nullable else None) for c in columns]
    return pa.Table.from_arrays(arrays, schema=schema)


def sorted_row_groups(
    chunks: Iterable[pa.Table],
    grid: SiteGrid,
    *,
    row_group_size: int = 262_144,
    memory_budget: int = 512 * 2**20,
    spill_dir: str | None = None,
    scan_order: bool = True,
) -> Iterator[pa.Table]:
    """Yield the points of `chunks` as row-group tables in Hilbert order of (x, y) on `grid`.

    Memory stays near `memory_budget` whatever the scan's size (the chunks themselves must each fit).
    Spill files live in a fresh folder under `spill_dir` (default: the system temp folder) and are
    removed when the generator finishes or is closed, also on error.
    """
    if row_group_size < 1:
        raise ValueError(f"row_group_size must be positive, got {row_group_size}")
    key_bits = 2 * grid.order
    key_dtype = np.dtype(np.uint32 if key_bits <= 32 else np.uint64)
    it = iter(chunks)
    first = next(it, None)
    if first is None:
        return
    schema = first.schema
    missing = [c for c in COORDS if c not in schema.names]
    if missing:
        raise ValueError(f"points need columns {', '.join(COORDS)}; missing {', '.join(missing)}")
    columns = [_Column.of(f) for f in schema]
    memory = _MemoryStore(columns)
    spill: _SpillStore | None = None
    tmp: str | None = None
    try:
        rows = 0
        for chunk in _chain(first, it):
            if not chunk.schema.equals(schema):
                raise ValueError(f"chunk {rows}.. has schema {chunk.schema}, expected {schema}")
            chunk = chunk.combine_chunks()
            keys, values, valid = _split(chunk, columns, grid)
            if spill is None:
                memory.add(keys, values, valid)
                if memory.nbytes() > memory_budget:
                    tmp = tempfile.mkdtemp(prefix=".scanshelf-spill-", dir=spill_dir)
                    spill = _SpillStore(columns, tmp, key_dtype, key_bits)
                    first_row = 0
                    for k, v, m in memory.drain():
                        spill.add(k, v, m, np.arange(first_row, first_row + len(k), dtype=np.int64))
                        first_row += len(k)
            else:
                spill.add(keys, values, valid, np.arange(rows, rows + len(keys), dtype=np.int64))
            rows += len(keys)
        store = memory if spill is None else spill
        yield from _emit_groups(store.buckets(memory_budget), columns, store.nullable, row_group_size, scan_order)
    finally:
        if spill is not None:
            spill.close()
        if tmp is not None:
            shutil.rmtree(tmp, ignore_errors=True)


def _chain(first: pa.Table, rest: Iterator[pa.Table]) -> Iterator[pa.Table]:
    yield first
    yield from rest


def _split(chunk: pa.Table, columns: list[_Column], grid: SiteGrid) -> tuple[np.ndarray, dict, dict]:
    values: dict[str, np.ndarray] = {}
    valid: dict[str, np.ndarray] = {}
    for c in columns:
        v, m = c.to_numpy(chunk.column(c.name).chunk(0) if chunk.num_rows else pa.array([], c.type))
        values[c.name] = v
        if m is not None:
            valid[c.name] = m
    places_x, places_y = chunk.schema.field("x").type.scale, chunk.schema.field("y").type.scale
    if places_x == places_y:
        keys = grid.keys_of_units(values["x"], values["y"], places_x)
    else:
        keys = grid.keys(values["x"] * 10.0**-places_x, values["y"] * 10.0**-places_y)
    return keys, values, valid
