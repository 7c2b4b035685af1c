"""Writing point files the way labs have them: LAS 1.2 / 1.4, LAZ and ASCII exports.

Points arrive as chunks (dicts of arrays) and are written as they come, so a file of any
size needs the memory of one chunk. Every file is written under a temporary name and
renamed into place once complete.
"""

from __future__ import annotations

import os
from collections.abc import Callable, Iterable, Iterator
from contextlib import contextmanager
from dataclasses import dataclass, field
from datetime import date
from pathlib import Path

import laspy
import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyproj

ADJUSTED_OFFSET = 1e9  # adjusted standard GPS time = GPS seconds - 1e9 (ASPRS LAS 1.4)
GPS_WEEK = 604_800.0
SOFTWARE = "scanshelf demo"


@contextmanager
def atomic(path: Path) -> Iterator[Path]:
    """Yield a temporary sibling of ``path``; rename it into place only if the block succeeds."""
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = path.with_name(f".{path.name}.partial")
    try:
        yield tmp
        os.replace(tmp, path)
    finally:
        tmp.unlink(missing_ok=True)


@dataclass
class PointStats:
    """Running count, bounds and time range of the points written (or of the first ``limit``)."""

    limit: int | None = None
    count: int = 0
    lower: np.ndarray = field(default_factory=lambda: np.full(3, np.inf))
    upper: np.ndarray = field(default_factory=lambda: np.full(3, -np.inf))
    first_gps: float = np.inf
    last_gps: float = -np.inf

    def add(self, xyz: np.ndarray, gps: np.ndarray, keep: np.ndarray | None = None) -> None:
        if keep is not None:
            xyz, gps = xyz[keep], gps[keep]
        if self.limit is not None:
            room = max(self.limit - self.count, 0)
            xyz, gps = xyz[:room], gps[:room]
        if gps.size == 0:
            return
        self.count += gps.size
        self.lower = np.minimum(self.lower, xyz.min(axis=0))
        self.upper = np.maximum(self.upper, xyz.max(axis=0))
        self.first_gps = min(self.first_gps, float(gps.min()))
        self.last_gps = max(self.last_gps, float(gps.max()))

    @property
    def bbox(self) -> list[float]:
        return [round(float(v), 4) for v in (*self.lower, *self.upper)]


@dataclass(frozen=True)
class LasSpec:
    """What kind of LAS/LAZ file to write."""

    version: str  # "1.2" or "1.4"
    point_format: int
    compressed: bool
    crs: str | None  # None: no CRS record at all
    adjusted_time: bool  # global encoding bit 0: adjusted standard GPS time, else week seconds
    scale: float
    offset: tuple[float, float, float]
    extra: tuple[tuple[str, str, str], ...] = ()  # (name, numpy type, description)
    system: str = "QG-TLS"
    created: date = date(2026, 11, 30)


def _quantize(values: np.ndarray, scale: float, offset: float) -> np.ndarray:
    return np.rint((values - offset) / scale).astype(np.int32)


def write_las(path: Path, chunks: Iterable[dict], spec: LasSpec, stats: PointStats) -> None:
    """Stream chunks into one LAS or LAZ file with laspy's writer."""
    header = laspy.LasHeader(point_format=spec.point_format, version=spec.version)
    header.scales = np.full(3, spec.scale)
    header.offsets = np.array(spec.offset)
    header.creation_date = spec.created
    header.generating_software = SOFTWARE
    header.system_identifier = spec.system
    header.global_encoding.gps_time_type = (
        laspy.header.GpsTimeType.STANDARD if spec.adjusted_time else laspy.header.GpsTimeType.WEEK_TIME
    )
    if spec.extra:
        header.add_extra_dims([laspy.ExtraBytesParams(n, t, description=d) for n, t, d in spec.extra])
    if spec.crs is not None:
        header.add_crs(pyproj.CRS.from_user_input(spec.crs))
    backend = laspy.LazBackend.Lazrs if spec.compressed else None
    dims = set(header.point_format.dimension_names)
    with atomic(path) as tmp:
        with laspy.open(tmp, mode="w", header=header, do_compress=spec.compressed, laz_backend=backend) as out:
            for chunk in chunks:
                n = chunk["x"].size
                rec = laspy.ScaleAwarePointRecord.zeros(n, header=header)
                raw = [_quantize(chunk[a], spec.scale, o) for a, o in zip("xyz", spec.offset)]
                rec.X, rec.Y, rec.Z = raw
                for name in ("intensity", "return_number", "number_of_returns", "classification",
                             "point_source_id", "red", "green", "blue"):
                    if name in dims:
                        rec[name] = chunk[name]
                gps = chunk["gps_time"]
                rec.gps_time = gps - ADJUSTED_OFFSET if spec.adjusted_time else np.mod(gps, GPS_WEEK)
                for name, _, _ in spec.extra:
                    rec[name] = chunk[name]
                out.write_points(rec)
                xyz = np.column_stack([r * spec.scale + o for r, o in zip(raw, spec.offset)])
                stats.add(xyz, gps)


def fixed(values: np.ndarray, places: int) -> pa.Array:
    """Numbers as text with exactly ``places`` decimals, built from integers (exact, fast)."""
    units = np.rint(np.asarray(values, dtype=np.float64) * 10**places).astype(np.int64)
    sign = np.where(units < 0, "-", "")
    mag = np.abs(units)
    whole = pa.array(mag // 10**places).cast(pa.string())
    text = pc.binary_join_element_wise(pa.array(sign), whole, "")
    if places:
        frac = pc.utf8_lpad(pa.array(mag % 10**places).cast(pa.string()), places, "0")
        text = pc.binary_join_element_wise(text, frac, ".")
    return text


@dataclass(frozen=True)
class AsciiSpec:
    """An ASCII export: header names for x, y, z, intensity, time and the delimiter."""

    names: tuple[str, str, str, str, str]
    delimiter: str


def write_ascii(
    path: Path,
    chunks: Iterable[dict],
    spec: AsciiSpec,
    stats: PointStats,
    spoil: Callable[[int, pa.Array], tuple[pa.Array, np.ndarray]] | None = None,
) -> None:
    """Stream chunks to a text file with a header row; times as GPS seconds of the week.

    ``spoil(first_row, lines)`` may damage some lines of a chunk to plant a fault; it returns
    the new lines and a mask of the rows that still hold a good point.
    """
    with atomic(path) as tmp, open(tmp, "wb") as out:
        out.write((spec.delimiter.join(spec.names) + "\n").encode())
        row = 0
        for chunk in chunks:
            gps = chunk["gps_time"]
            columns = [
                fixed(chunk["x"], 3),
                fixed(chunk["y"], 3),
                fixed(chunk["z"], 3),
                pa.array(chunk["intensity"]).cast(pa.string()),
                fixed(np.mod(gps, GPS_WEEK), 6),
            ]
            line = pc.binary_join_element_wise(*columns, spec.delimiter)
            keep = None
            if spoil is not None:
                line, keep = spoil(row, line)
            line = pc.binary_join_element_wise(line, pa.scalar(""), "\n")
            out.write(_text_bytes(line))
            xyz = np.column_stack([np.rint(chunk[a] * 1000.0) / 1000.0 for a in "xyz"])
            stats.add(xyz, gps, keep)
            row += gps.size


def _text_bytes(arr: pa.Array) -> memoryview:
    """The concatenated UTF-8 bytes of a string array, without a copy per row."""
    arr = arr.cast(pa.large_string()) if arr.type != pa.large_string() else arr
    offsets = np.frombuffer(arr.buffers()[1], dtype=np.int64)[arr.offset : arr.offset + len(arr) + 1]
    return memoryview(arr.buffers()[2])[offsets[0] : offsets[-1]]
