"""Read only the points a window needs from one scan's Parquet file.

Per scan: one request for the tail (footer), then one request per coalesced run of the
column chunks whose row-group statistics intersect the window. The bytes land in a sparse
in-memory file that pyarrow decodes as if it were the whole file, so no generic readahead or
directory probe (``isdir`` does a full GET over HTTP) ever runs.
"""

from __future__ import annotations

import io
import json
from dataclasses import dataclass

import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq
from fsspec import AbstractFileSystem

from archive.points.coords import AxisEncoding, units_of

FOOTER_GUESS = 64 * 1024  # one tail read holds the footer of typical scans
COALESCE_GAP = 8 * 1024  # merge ranges closer than this: a request costs more than the gap; wider gaps
# would pull in the other columns of the row groups between two wanted ranges
AXES = ("x", "y", "z")

BBox = tuple[float, float, float, float]


class _SparseFile(io.RawIOBase):
    """A seekable file of known size made of fetched ranges; misses fetch (and are counted)."""

    def __init__(self, size: int, fetch):
        self._size = size
        self._fetch = fetch
        self._pos = 0
        self._blocks: list[tuple[int, bytes]] = []

    def add(self, start: int, data: bytes) -> None:
        self._blocks.append((start, data))

    def readable(self) -> bool:
        return True

    def seekable(self) -> bool:
        return True

    def tell(self) -> int:
        return self._pos

    def seek(self, pos: int, whence: int = 0) -> int:
        base = {0: 0, 1: self._pos, 2: self._size}[whence]
        self._pos = base + pos
        return self._pos

    def read(self, n: int = -1) -> bytes:
        end = self._size if n is None or n < 0 else min(self._size, self._pos + n)
        start = self._pos
        self._pos = end
        if end <= start:
            return b""
        for bstart, data in self._blocks:
            if bstart <= start and end <= bstart + len(data):
                return data[start - bstart : end - bstart]
        data = self._fetch(start, end)
        self.add(start, data)
        return data

    def readinto(self, b) -> int:
        data = self.read(len(b))
        b[: len(data)] = data
        return len(data)


@dataclass(frozen=True)
class ScanFile:
    """Where one scan's points are: a path on the shelf filesystem and its size in bytes."""

    scan_id: str
    path: str
    size: int


def _coalesce(ranges: list[tuple[int, int]], gap: int = COALESCE_GAP) -> list[tuple[int, int]]:
    out: list[list[int]] = []
    for start, end in sorted(ranges):
        if out and start - out[-1][1] <= gap:
            out[-1][1] = max(out[-1][1], end)
        else:
            out.append([start, end])
    return [(s, e) for s, e in out]


def _row_group_hits(rg: pq.RowGroupMetaData, names: dict[str, int], bbox: BBox) -> bool:
    """False only when statistics prove the group lies outside the window."""
    eps = 1e-9 * max(1.0, *(abs(b) for b in bbox))
    for axis, lo, hi in (("x", bbox[0], bbox[2]), ("y", bbox[1], bbox[3])):
        stats = rg.column(names[axis]).statistics
        if stats is None or not stats.has_min_max:
            continue
        if float(stats.max) < lo - eps or float(stats.min) > hi + eps:
            return False
    return True


def axes_of(metadata: pq.FileMetaData) -> dict[str, AxisEncoding]:
    """Per-axis encodings from the file's ``scanshelf`` key-value metadata (empty if absent)."""
    raw = (metadata.metadata or {}).get(b"scanshelf")
    if not raw:
        return {}
    axes = json.loads(raw).get("axes") or {}
    return {k: AxisEncoding.from_dict(v) for k, v in axes.items()}


def _exact(data: bytes, scan: ScanFile, start: int, end: int) -> bytes:
    """Storage that returns fewer bytes than asked must not be decoded as if it were whole."""
    if len(data) != end - start:
        raise OSError(f"{scan.path}: short read, {len(data)} of {end - start} bytes at {start}; nothing was used, try again")
    return data


def open_footer(fs: AbstractFileSystem, scan: ScanFile) -> tuple[pq.ParquetFile, _SparseFile]:
    """One tail request (two if the footer is larger than the guess).

    Files of one shelf have similar footers, so the guess grows to the largest footer seen on
    this filesystem (``tail_hint``): only the first large footer costs a second request.
    """
    sparse = _SparseFile(scan.size, lambda s, e: _exact(fs.cat_file(scan.path, start=s, end=e), scan, s, e))
    start = max(0, scan.size - getattr(fs, "tail_hint", FOOTER_GUESS))
    tail = fs.cat_file(scan.path, start=start, end=scan.size)
    if len(tail) != scan.size - start or tail[-4:] != b"PAR1":
        raise ValueError(
            f"{scan.path}: not a Parquet file of the {scan.size} bytes the items index says; "
            "the shelf may be half-published or changed since: publish it again"
        )
    need = int.from_bytes(tail[-8:-4], "little") + 8
    if need > len(tail):  # one block, so pyarrow's single footer read is served from memory
        head = max(0, scan.size - need)
        tail = _exact(fs.cat_file(scan.path, start=head, end=start), scan, head, start) + tail
        start = head
        if hasattr(fs, "tail_hint"):
            fs.tail_hint = max(fs.tail_hint, need + 4096)
    sparse.add(start, tail)
    return pq.ParquetFile(sparse), sparse


def _floats(table: pa.Table, axes: dict[str, AxisEncoding]) -> pa.Table:
    for axis in AXES:
        if axis not in table.column_names:
            continue
        col = table[axis]
        if pa.types.is_decimal(col.type):
            if axis in axes:
                values = pa.array(axes[axis].to_float(units_of(col)), pa.float64())
            else:
                values = pc.cast(col, pa.float64())
            table = table.set_column(table.column_names.index(axis), axis, values)
    return table


def join_scans(tables: list[pa.Table]) -> pa.Table:
    """Points of several scans as one table: columns a scan lacks become nulls, types widen where
    scans differ, and per-file metadata (axes, CRS), which describes one scan, is dropped. Fields
    become nullable first: a column that is REQUIRED in one file (LAS) may be missing from another.
    """
    loose = [pa.Table.from_arrays(t.columns, schema=pa.schema([f.with_nullable(True) for f in t.schema])) for t in tables]
    return pa.concat_tables(loose, promote_options="permissive")


def read_scan(
    fs: AbstractFileSystem,
    scan: ScanFile,
    bbox: BBox | None = None,
    columns: list[str] | None = None,
    exact: bool = False,
) -> pa.Table:
    """Points of one scan inside ``bbox`` (inclusive), with a ``scan_id`` column.

    x, y, z come back as float64 rebuilt exactly as a LAS reader computes them, or as the
    stored decimals with ``exact=True``.
    """
    pf, sparse = open_footer(fs, scan)
    md = pf.metadata
    names = {md.schema.column(j).path: j for j in range(md.num_columns)}
    wanted = list(columns) if columns is not None else pf.schema_arrow.names
    missing = [c for c in wanted if c not in names]
    if missing:
        raise KeyError(f"{scan.path}: no column(s) {missing}; columns are {sorted(names)}")
    fetch = list(dict.fromkeys(wanted + (["x", "y"] if bbox is not None else [])))
    groups = [
        i for i in range(md.num_row_groups)
        if bbox is None or _row_group_hits(md.row_group(i), names, bbox)
    ]
    ranges = []
    for i in groups:
        rg = md.row_group(i)
        for name in fetch:
            cc = rg.column(names[name])
            start = cc.data_page_offset
            if cc.has_dictionary_page and cc.dictionary_page_offset:
                start = min(start, cc.dictionary_page_offset)
            ranges.append((start, start + cc.total_compressed_size))
    runs = _coalesce(ranges)
    if runs:
        starts, ends = [s for s, _ in runs], [e for _, e in runs]
        for start, end, data in zip(starts, ends, fs.cat_ranges([scan.path] * len(runs), starts, ends, on_error="raise")):
            sparse.add(start, _exact(data, scan, start, end))
    axes = axes_of(md)
    if groups:
        try:
            table = pf.read_row_groups(groups, columns=fetch)
        except pa.ArrowException as e:
            raise ValueError(f"{scan.path}: cannot be decoded ({e}); the file may be damaged: run `scanshelf verify`") from None
    else:
        table = pf.schema_arrow.empty_table().select(fetch)
    if bbox is not None:
        xy = _floats(table.select(["x", "y"]), axes)
        x, y = xy["x"], xy["y"]
        inside = pc.and_(
            pc.and_(pc.greater_equal(x, bbox[0]), pc.less_equal(x, bbox[2])),
            pc.and_(pc.greater_equal(y, bbox[1]), pc.less_equal(y, bbox[3])),
        )
        table = table.filter(inside)
    table = table.select(wanted)
    if not exact:
        table = _floats(table, axes)
    return table.append_column("scan_id", pa.array([scan.scan_id] * table.num_rows, pa.string()))
