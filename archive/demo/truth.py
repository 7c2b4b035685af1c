"""What the demo wrote, as frozen values: the answer key that tests of every stage check.

The JSON file ``demo-truth.json`` lives beside ``source/``, never inside it, so a survey of
the source cannot see the answers. ``DemoTruth.load`` reads it back into these dataclasses.
"""

from __future__ import annotations

import json
import types
import typing
from dataclasses import asdict, dataclass, fields, is_dataclass
from pathlib import Path

SCHEMA = "scanshelf-demo-truth/1"


@dataclass(frozen=True)
class Fault:
    """A planted fault and what a careful reader should make of it."""

    kind: str  # "truncated" | "count_mismatch" | "bad_rows" | "duplicate" | "no_crs"
    expect: str  # one sentence: what is wrong and what salvage can keep
    recoverable_points: int  # points a --salvage migration can keep
    details: dict  # kind-specific numbers (header_point_count, nan_rows, duplicate_of, ...)


@dataclass(frozen=True)
class PointFile:
    """One LAS/LAZ/ASCII file under source/."""

    path: str  # relative to source/, forward slashes
    format: str  # "las" | "laz" | "ascii"
    station: str  # station id (the first folder level)
    scan_id: str  # "<station>-YYYYMMDDTHHMMSSZ"
    scan_time: str  # UTC ISO "YYYY-MM-DDTHH:MM:SSZ": first point (LAS 1.4) or file-name stamp
    end_time: str  # UTC ISO of the last recoverable point (rounded down to the second)
    time_source: str  # "gps_time" (adjusted standard) | "file_name"
    time_stamp: str | None  # the stamp style in the file name, e.g. "YYYYMMDD_HHMMSS"
    gps_time_type: str  # "adjusted_standard" | "week_seconds"
    las_version: str | None  # "1.2" | "1.4" | None for ASCII
    point_format: int | None
    compressed: bool
    crs: str | None  # "EPSG:32633" or None when the file declares none
    crs_source: str | None  # "wkt_vlr" | "geotiff_keys" | None
    columns: tuple[str, ...]  # attribute names as the source spells them
    extra_bytes: dict  # LAS extra-bytes name -> numpy type
    scale: tuple[float, float, float] | None
    offset: tuple[float, float, float] | None
    point_count: int  # points generated into the file before any fault
    header_point_count: int | None  # what the header claims (LAS only)
    recoverable_points: int  # points readable with --salvage (== point_count when healthy)
    bbox: tuple[float, ...]  # xmin ymin zmin xmax ymax zmax of the recoverable points
    tide_m: float  # modelled sea level at scan_time (m)
    fault: Fault | None
    needs_site_file: tuple[str, ...]  # what zero-config cannot know: "crs", "time"
    sha256: str
    size: int


@dataclass(frozen=True)
class GridFile:
    """One legacy grid file under source/ (its sidecars listed with it)."""

    path: str
    format: str  # "geotiff" | "netcdf" | "aaigrid"
    station: str
    product: str  # "dem" | "displacement" | "strain_rate"
    crs: str | None
    shape: tuple[int, int]  # rows, cols
    transform: tuple[float, ...]  # affine a, b, c, d, e, f (cell edges)
    variables: tuple[str, ...]  # band descriptions or NetCDF variable names
    units: dict
    nodata: float
    dtype: str
    needs_site_file: tuple[str, ...]
    sidecars: tuple[str, ...]
    sha256: str
    size: int
    time: str | None = None  # one epoch (DEM)
    start: str | None = None  # interval products
    end: str | None = None
    crs_source: str | None = None
    intended_crs: str | None = None  # the CRS a site file should give a file that lacks one


@dataclass(frozen=True)
class OtherFile:
    """A file that is not data (README, thumbnail cache)."""

    path: str
    note: str
    sha256: str
    size: int


@dataclass(frozen=True)
class StationInfo:
    id: str
    folder: str
    origin: tuple[float, float, float]  # scanner position in the site CRS
    point_source_id: int
    azimuth: tuple[float, float]  # compass degrees of the sweep
    elevation: tuple[float, float]
    scan_duration_s: float


@dataclass(frozen=True)
class DemoTruth:
    """Everything make_demo wrote and what each file should yield."""

    schema: str
    params: dict
    site: dict  # name, crs, origin, model constants (tide, flow, thinning)
    stations: tuple[StationInfo, ...]
    site_file: str | None  # path of the site file relative to the demo folder, if one is needed
    point_files: tuple[PointFile, ...]
    grid_files: tuple[GridFile, ...]
    other_files: tuple[OtherFile, ...]
    totals: dict

    def to_dict(self) -> dict:
        return asdict(self)

    def save(self, path: Path) -> None:
        tmp = path.with_name(f".{path.name}.partial")
        tmp.write_text(json.dumps(self.to_dict(), indent=1, sort_keys=False) + "\n")
        tmp.replace(path)

    @classmethod
    def from_dict(cls, d: dict) -> "DemoTruth":
        if d.get("schema") != SCHEMA:
            raise ValueError(f"not a demo truth file of schema {SCHEMA!r}: {d.get('schema')!r}")
        return _build(cls, d)

    @classmethod
    def load(cls, path: str | Path) -> "DemoTruth":
        return cls.from_dict(json.loads(Path(path).read_text()))

    def file(self, path: str) -> PointFile:
        return next(f for f in self.point_files if f.path == path)

    def faults(self, kind: str) -> list[PointFile]:
        return [f for f in self.point_files if f.fault is not None and f.fault.kind == kind]


def _build(tp, value):
    """JSON value → the annotated type (dataclasses, tuples, optionals), recursively."""
    if value is None:
        return None
    origin = typing.get_origin(tp)
    if origin in (typing.Union, types.UnionType):
        inner = [a for a in typing.get_args(tp) if a is not type(None)]
        return _build(inner[0], value)
    if is_dataclass(tp):
        hints = typing.get_type_hints(tp)
        return tp(**{f.name: _build(hints[f.name], value[f.name]) for f in fields(tp) if f.name in value})
    if origin is tuple:
        args = typing.get_args(tp)
        item = args[0] if len(args) == 2 and args[1] is Ellipsis else None
        if item is not None:
            return tuple(_build(item, v) for v in value)
        return tuple(_build(a, v) for a, v in zip(args, value))
    return value
