"""What one converted scan is known to be: the hand-off from migration to catalog and grids.

Kept as plain frozen values so they pickle to and from dask workers and serialise to JSON
for the ledger.
"""

from __future__ import annotations

import json
from dataclasses import asdict, dataclass, field
from datetime import datetime


@dataclass(frozen=True)
class ColumnInfo:
    """One Parquet column of a scan: name, Arrow type, byte size per value and statistics."""

    name: str
    type: str  # Arrow type string, e.g. "int64", "decimal128(18, 3)", "uint16"
    size: int  # bytes per value in the source record (8 for float64, ...)
    minimum: float | None = None
    maximum: float | None = None
    mean: float | None = None
    stddev: float | None = None


@dataclass(frozen=True)
class ScanRecord:
    """Everything later stages need about one converted scan, without reopening its points."""

    scan_id: str
    station: str
    start: datetime  # UTC, timezone-aware: the scan's nominal time (id time)
    end: datetime  # UTC: the latest point time, or == start when points carry no time
    first_point_time: datetime | None  # UTC, from the points, when they carry time
    crs_wkt: str  # WKT2 of the shelf CRS the coordinates are in
    crs_code: str | None  # "EPSG:32633" when the CRS has an authority code
    bbox: tuple[float, float, float, float, float, float]  # native xmin ymin zmin xmax ymax zmax
    point_count: int
    points_href: str  # shelf-relative path of the Parquet file
    points_size: int  # bytes
    points_sha256: str  # hex digest of the Parquet file
    row_groups: int
    columns: tuple[ColumnInfo, ...]
    source_path: str  # relative to the source root
    source_sha256: str
    source_format: str  # "las", "laz", "ascii"
    partial: bool = False  # converted with --salvage from a damaged file
    problems: tuple[str, ...] = ()
    scanner_origin: tuple[float, float, float] | None = None
    footprint: dict | None = None  # GeoJSON geometry in WGS84 of where points are
    preview_href: str | None = None  # shelf-relative PNG, if written
    grid_href: str | None = None  # shelf-relative station cube holding this scan's time step
    extra: dict = field(default_factory=dict)
    time_source: str | None = None  # survey.TIME_SOURCES key: where `start` came from

    @property
    def duration_seconds(self) -> float:
        return (self.end - self.start).total_seconds()

    def to_json(self) -> str:
        d = asdict(self)
        for k in ("start", "end", "first_point_time"):
            d[k] = d[k].isoformat() if d[k] is not None else None
        return json.dumps(d)

    @classmethod
    def from_json(cls, text: str) -> "ScanRecord":
        d = json.loads(text)
        for k in ("start", "end", "first_point_time"):
            d[k] = datetime.fromisoformat(d[k]) if d[k] is not None else None
        d["bbox"] = tuple(d["bbox"])
        d["columns"] = tuple(ColumnInfo(**c) for c in d["columns"])
        d["problems"] = tuple(d["problems"])
        if d.get("scanner_origin") is not None:
            d["scanner_origin"] = tuple(d["scanner_origin"])
        return cls(**d)
