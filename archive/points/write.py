"""Write one scan's points as a Hilbert-sorted Parquet file, with checksum and statistics.

Encodings were chosen by measurement (benchmarks/points.py, scan-like points): x, y, z as DECIMAL
stored as INT64 with DELTA_BINARY_PACKED and other integers likewise (in scan order neighbouring
values differ little), floats with BYTE_STREAM_SPLIT, 8-bit enums and flags PLAIN (dictionaries
on them cost 10-20 % of the write time for under 1 % of size once zstd has run; on wide columns
they cost far more), zstd level 1 (levels 2-3 saved about 1 % for a few % of speed).
The checksum and the statistics are computed from the bytes and values as they are written, so
the file is never read back.
"""

from __future__ import annotations

import base64
import hashlib
import io
import json
import math
from collections.abc import Callable, Iterable
from dataclasses import dataclass

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from ..records import ColumnInfo
from ..storage import filesystem
from .coords import units_of
from .hilbert import SiteGrid
from .rows import COORDS, Rows
from .sort import sorted_row_groups

META_KEY = b"scanshelf"
WRITE_BUFFER = 4 * 2**20  # bytes gathered before they are hashed and written
BATCH_ROWS = 1 << 18  # rows of whole row groups per write call: small groups cost per call, not per row
STATISTICS = ("x", "y", "z", "gps_time", "time")  # the columns readers prune on; others' min/max only grow the footer

# Row-group size (see row_group_rows): a read of a window fetches the footer plus every row group
# whose min/max box meets the window. Measured on scan-like points (benchmarks/remote.py):
FOOTER_BYTES_PER_GROUP = 720  # ~90 B of metadata per column chunk, 8 columns
XYZ_BYTES_PER_POINT = 4.0  # x, y, z compressed (DELTA_BINARY_PACKED + zstd-1)
BOX_SPREAD = 4.0  # fitted: a Hilbert range's min/max box meets windows more often than its cells do
DESIGN_WINDOW = 20.0 * 20.0  # m²: the window rows are sized for (a slope failure, a building face)
DESIGN_SHARE = 0.02  # window share used when the footprint is unknown
MIN_ROWS, MAX_ROWS = 4096, 1 << 20  # below: encodings restart too often; above: pruning is moot


def row_group_rows(points: int | None, bounds: tuple[float, ...] | None = None) -> int:
    """Rows per row group for a scan of ``points`` over ``bounds`` (xmin, ymin, [zmin,] xmax, ymax, ...).

    A window that covers a share w of the footprint reads about (√w + √(1/G))² of the points
    when the scan is cut into G spatially tight (Hilbert) row groups, plus G footers' worth of
    column-chunk metadata. Setting the derivative of the sum to zero gives
    G = (s·N·b·√w / f)^(2/3) for N points, b bytes of x, y, z per point, f footer bytes per
    group and s a fitted spread of a group's min/max box: ~290 groups for 1.5M points, ~1,950
    for 30M, so small scans get small row groups and the footer stays a fraction of what a
    window reads. w is a 20 m × 20 m window's share of
    the footprint (2 % when the footprint is unknown).
    """
    if not points or points <= MIN_ROWS:
        return MIN_ROWS
    share = DESIGN_SHARE
    if bounds is not None and len(bounds) in (4, 6):
        n = len(bounds) // 2
        area = max(0.0, bounds[n] - bounds[0]) * max(0.0, bounds[n + 1] - bounds[1])
        if area > 0 and math.isfinite(area):
            share = min(1.0, DESIGN_WINDOW / area)
    groups = max(1.0, (BOX_SPREAD * points * XYZ_BYTES_PER_POINT * math.sqrt(share) / FOOTER_BYTES_PER_GROUP) ** (2 / 3))
    rows = int(points / groups) // 1024 * 1024
    return int(min(MAX_ROWS, max(MIN_ROWS, rows)))


@dataclass(frozen=True)
class Encoding:
    """Parquet encoding choices; the defaults are the measured best (see benchmarks/points.py)."""

    compression: str = "zstd"
    compression_level: int | None = 1
    coordinates: str = "DELTA_BINARY_PACKED"  # x, y, z (INT64 decimals)
    floats: str = "BYTE_STREAM_SPLIT"
    integers: str | None = "DELTA_BINARY_PACKED"  # other integer columns; None = PLAIN
    dictionary_enums: bool = False  # dictionary-encode 8-bit and boolean columns

    def writer_options(self, schema: pa.Schema) -> dict:
        encodings: dict[str, str] = {}
        dictionary: list[str] = []
        for f in schema:
            t = f.type
            if f.name in COORDS and pa.types.is_decimal(t):  # float64 coordinates: as floats
                encodings[f.name] = self.coordinates
            elif pa.types.is_boolean(t) or (pa.types.is_integer(t) and t.bit_width == 8):
                if self.dictionary_enums:  # else PLAIN: zstd packs the small values as well
                    dictionary.append(f.name)
            elif pa.types.is_floating(t) and self.floats != "PLAIN":
                encodings[f.name] = self.floats
            elif pa.types.is_integer(t) and self.integers:
                encodings[f.name] = self.integers
        return {
            "compression": self.compression,
            "compression_level": self.compression_level,
            "use_dictionary": dictionary or False,
            "column_encoding": encodings or None,
            "store_decimal_as_integer": True,
            "write_statistics": [c for c in STATISTICS if c in schema.names],
        }


@dataclass(frozen=True)
class WrittenScan:
    """What was written: enough for the catalog and the ledger without reopening the file."""

    rows: int
    row_groups: int
    size: int  # bytes
    sha256: str  # hex digest of the file's bytes
    columns: tuple[ColumnInfo, ...]  # per-column statistics; x, y, z in real units
    bbox: tuple[float, float, float, float, float, float]  # xmin, ymin, zmin, xmax, ymax, zmax

    @property
    def statistics(self) -> dict[str, ColumnInfo]:
        return {c.name: c for c in self.columns}


def write_scan(
    chunks: Iterable[pa.Table] | Rows,
    dest: str,
    grid: SiteGrid,
    *,
    metadata: dict,
    row_group_size: int = 262_144,
    memory_budget: int = 512 * 2**20,
    spill_dir: str | None = None,
    on_sorted: Callable[[pa.Table], None] | None = None,
    encoding: Encoding = Encoding(),
    scan_order: bool = True,
    storage_options: dict | None = None,
) -> WrittenScan:
    """Sort `chunks` (pyarrow Tables with decimal x, y, z, or `Rows` of records) into Hilbert row
    groups and write `dest`.

    `dest` is written exactly as named (the caller picks temporary names and renames).
    `metadata` becomes the file's key-value metadata; the JSON under b"scanshelf" (str, bytes or
    dict) gains "site_grid", "row_group_size" and "row_order". `on_sorted` sees every row once,
    in file order, as it is written, so other products (grids, footprints) need no second read;
    its tables hold whole row groups, several at a time when they are small (up to BATCH_ROWS rows),
    with decimal coordinates as decimal64 (readers of the file get decimal128: see `_key_values`).
    """
    groups = sorted_row_groups(
        chunks, grid, row_group_size=row_group_size, memory_budget=memory_budget,
        spill_dir=spill_dir, scan_order=scan_order, batch_rows=BATCH_ROWS,
    )
    stats: dict[str, _Moments] = {}
    rows = count = 0
    writer: pq.ParquetWriter | None = None
    fs, path = filesystem(dest, storage_options)
    with fs.open(path, "wb") as raw:
        sink = _HashingSink(raw)
        # the Parquet writer makes thousands of small writes per row group: buffered, the hash and
        # the file see a few large ones
        buffered = io.BufferedWriter(sink, buffer_size=WRITE_BUFFER)
        try:
            for table in groups:
                if writer is None:
                    schema = table.schema.with_metadata(_metadata(metadata, grid, row_group_size, scan_order))
                    writer = pq.ParquetWriter(buffered, schema, store_schema=False, **encoding.writer_options(schema))
                    stats = {f.name: _Moments() for f in schema if _has_moments(f)}
                writer.write_table(table, row_group_size=row_group_size)  # whole groups: split exactly there
                for name, m in stats.items():
                    m.add(_values(table.column(name)))
                rows += len(table)
                count += -(-len(table) // row_group_size)
                if on_sorted is not None:
                    on_sorted(table)
            if writer is not None:
                writer.add_key_value_metadata(_key_values(schema))
        finally:
            groups.close()  # removes spill files, also on error
            if writer is not None:
                writer.close()  # on error the caller discards the file; closing keeps `raw` consistent
            buffered.close()  # flushes into the sink (which leaves `raw` open)
    if writer is None:
        raise ValueError(f"no points to write to {dest}: the scan is empty")
    columns = tuple(_column_info(f, stats.get(f.name)) for f in schema)
    info = {c.name: c for c in columns}
    bbox = tuple(info[a].minimum for a in COORDS) + tuple(info[a].maximum for a in COORDS)
    return WrittenScan(rows, count, sink.size, sink.sha256.hexdigest(), columns, bbox)  # type: ignore[arg-type]


def _metadata(metadata: dict, grid: SiteGrid, row_group_size: int, scan_order: bool) -> dict[bytes, bytes]:
    out = {_bytes(k): _bytes(v) for k, v in metadata.items() if _bytes(k) != META_KEY}
    given = metadata.get(META_KEY.decode(), metadata.get(META_KEY, {}))
    doc = json.loads(given) if isinstance(given, (str, bytes)) else dict(given)
    doc.update(
        site_grid=grid.to_dict(),
        row_group_size=row_group_size,
        row_order="hilbert row groups, scan order inside" if scan_order else "hilbert",
    )
    out[META_KEY] = json.dumps(doc).encode()
    return out


def _key_values(schema: pa.Schema) -> dict[bytes, bytes]:
    """The footer's key-value metadata: the schema's own, and the Arrow schema that a reader gets
    back, with decimal64 coordinates as decimal128. The file is then byte for byte the one that
    writing decimal128 columns gives; decimal64 only spares the writer building 16-byte values.
    """
    fields = [pa.field(f.name, pa.decimal128(f.type.precision, f.type.scale), f.nullable, f.metadata)
              if pa.types.is_decimal(f.type) else f for f in schema]
    readable = pa.schema(fields, metadata=schema.metadata)
    return {**(schema.metadata or {}), b"ARROW:schema": base64.b64encode(readable.serialize().to_pybytes())}


def _bytes(v: object) -> bytes:
    if isinstance(v, bytes):
        return v
    return (v if isinstance(v, str) else json.dumps(v)).encode()


class _HashingSink(io.RawIOBase):
    """Forwards writes to a file and hashes and counts them on the way."""

    def __init__(self, raw):
        self.raw = raw
        self.sha256 = hashlib.sha256()
        self.size = 0

    def writable(self) -> bool:
        return True

    def write(self, b) -> int:
        nbytes = memoryview(b).nbytes
        self.sha256.update(b)
        self.raw.write(b)  # fsspec and local files write everything or raise
        self.size += nbytes
        return nbytes

    def tell(self) -> int:
        return self.size

    def flush(self) -> None:
        self.raw.flush()

    def close(self) -> None:  # the owner of `raw` closes it
        super().close()


class _Moments:
    """Count, min, max, mean and M2 merged across row groups (pairwise update of Chan et al.)."""

    def __init__(self) -> None:
        self.n, self.min, self.max, self.mean, self.m2 = 0, math.inf, -math.inf, 0.0, 0.0

    def add(self, v: np.ndarray) -> None:
        if not v.size:
            return
        # min and max in the column's own type (float64 conversion keeps order: the same values),
        # where 8-bit flags cost a sixteenth of a float64 pass; a constant batch, as most flag
        # columns are, then needs no float64 pass at all (its mean is the value, M2 zero)
        mn, mx = float(v.min()), float(v.max())
        n = v.size
        if mn == mx:
            mean, m2 = mn, 0.0
        else:
            d = v.astype(np.float64)
            mean = float(d.sum()) / n
            d -= mean
            m2 = float(np.einsum("i,i->", d, d))  # BLAS dot can be far slower on some CPUs
        delta = mean - self.mean
        total = self.n + n
        self.mean += delta * n / total
        self.m2 += m2 + delta * delta * self.n * n / total
        self.n = total
        self.min, self.max = min(self.min, mn), max(self.max, mx)


def _has_moments(field: pa.Field) -> bool:
    t = field.type
    return field.name in COORDS or pa.types.is_integer(t) or pa.types.is_floating(t) or pa.types.is_boolean(t)


def _values(column: pa.ChunkedArray) -> np.ndarray:
    """Values for statistics without copying: decimals as (a strided view of the low words of) their units."""
    if pa.types.is_decimal(column.type):
        parts = [units_of(a, copy=False) for a in column.chunks]
        return parts[0] if len(parts) == 1 else np.concatenate(parts)
    column = column.drop_null() if column.null_count else column
    if pa.types.is_boolean(column.type):
        return column.to_numpy(zero_copy_only=False).astype(np.uint8)
    return column.to_numpy()


def _column_info(field: pa.Field, m: _Moments | None) -> ColumnInfo:
    t = field.type
    size = 8 if field.name in COORDS else max(1, getattr(t, "bit_width", 8) // 8)
    # the type a reader gets back (the footer's Arrow schema says decimal128, see _key_values)
    name = str(pa.decimal128(t.precision, t.scale)) if pa.types.is_decimal(t) else str(t)
    if m is None or m.n == 0:
        return ColumnInfo(field.name, name, size)
    unit = 10.0 ** -t.scale if pa.types.is_decimal(t) else 1.0
    # decimals: min/max are exact decimals; scaling the integer by a power of ten rounds once
    scaled = (lambda v: v / 10.0**t.scale) if pa.types.is_decimal(t) else (lambda v: v)
    return ColumnInfo(
        field.name, name, size,
        minimum=scaled(m.min), maximum=scaled(m.max), mean=m.mean * unit, stddev=math.sqrt(m.m2 / m.n) * unit,
    )
