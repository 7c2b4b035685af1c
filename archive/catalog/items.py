"""One STAC Item per scan, built from its ScanRecord without reopening the points.

Every href is relative to the Item's own JSON file, so a shelf stays valid wherever it is
copied. The pointcloud fields follow v2.0.0, which pystac's helper does not target (it writes
v1.0.0 with ``pc:encoding``), so they are written here directly.
"""

from __future__ import annotations

from datetime import datetime, timezone
from functools import cache
from importlib.metadata import PackageNotFoundError, version
from typing import Any

import pystac
from pyproj import CRS, Geod, Transformer
from shapely.geometry import box, mapping, shape

from archive.catalog import extensions as ext
from archive.catalog.store import multihash_sha256, relative_href
from archive.frames import is_local
from archive.layout import CATALOG, SCANS_COLLECTION, ScanId, item_path
from archive.records import ColumnInfo, ScanRecord

SCANS_ID = "scans"
APPROXIMATE_TIMES = ("gps_week_header", "path_date", "header_date")  # known to the day only
PARQUET = "application/vnd.apache.parquet"
ZARR = "application/vnd.zarr; version=3"
PNG = "image/png"
JSON = "application/json"
ITEM_EXTENSIONS = [
    ext.POINTCLOUD,
    ext.PROJECTION,
    ext.FILE,
    ext.TIMESTAMPS,
    ext.PROCESSING,
    ext.SCANSHELF,
]


@cache
def software_version() -> str:
    try:
        return version("scanshelf")
    except PackageNotFoundError:
        return "0+unknown"


def scan_item(
    record: ScanRecord,
    published: datetime,
    thumbnail: tuple[int, str] | None = None,
) -> dict[str, Any]:
    """The Item JSON of one scan.

    ``thumbnail`` is (size, sha256 hex) of the preview PNG when it exists on the shelf;
    ``published`` is when the Item first appears in the catalog (timestamps extension).
    """
    here = item_path(ScanId.parse(record.scan_id))
    geometry, bbox = _footprint_and_bbox(record)
    start = record.first_point_time or record.start
    end = max(record.end, start)
    props: dict[str, Any] = {
        "published": _iso(published),
        **_projection(record),
        **_pointcloud(record, geometry),
        "processing:software": {"scanshelf": software_version()},
        "processing:lineage": (
            f"Converted from {record.source_format.upper()} to Hilbert-sorted Parquet by "
            "scanshelf migrate; coordinates kept as the source's exact decimals."
        ),
        **_own_fields(record),
    }
    item = pystac.Item(
        id=record.scan_id,
        geometry=geometry,
        bbox=bbox,
        datetime=record.start,
        start_datetime=start,
        end_datetime=end,
        properties=props,
        stac_extensions=list(ITEM_EXTENSIONS),
        collection=SCANS_ID,
    )
    item.add_asset(
        "points",
        pystac.Asset(
            href=relative_href(here, record.points_href),
            media_type=PARQUET,
            roles=["data"],
            title="Points (Hilbert-sorted Parquet)",
            extra_fields={
                "file:size": record.points_size,
                "file:checksum": multihash_sha256(record.points_sha256),
            },
        ),
    )
    if thumbnail is not None and record.preview_href:
        item.add_asset(
            "thumbnail",
            pystac.Asset(
                href=relative_href(here, record.preview_href),
                media_type=PNG,
                roles=["thumbnail"],
                title="Preview",
                extra_fields={"file:size": thumbnail[0], "file:checksum": multihash_sha256(thumbnail[1])},
            ),
        )
    for rel, target, title in (
        ("root", CATALOG, "Shelf catalog"),
        ("parent", SCANS_COLLECTION, "Scans"),
        ("collection", SCANS_COLLECTION, "Scans"),
    ):
        item.add_link(pystac.Link(rel, relative_href(here, target), media_type=JSON, title=title))
    if record.grid_href:
        # The station cube holds this scan as one time step; the link names that step.
        item.add_link(
            pystac.Link(
                "related",
                relative_href(here, record.grid_href),
                media_type=ZARR,
                title="Station grid cube (this scan's time step)",
                extra_fields={f"{ext.PREFIX}time_step": _iso(record.start)},
            )
        )
    return item.to_dict(include_self_link=False, transform_hrefs=False)


def _iso(t: datetime) -> str:
    return t.astimezone(timezone.utc).isoformat().replace("+00:00", "Z")


@cache
def _to_wgs84(crs_wkt: str) -> Transformer:
    """One transformer per CRS: building it costs more than a whole Item otherwise."""
    return Transformer.from_crs(CRS.from_wkt(crs_wkt), CRS.from_epsg(4326), always_xy=True)


def _footprint_and_bbox(record: ScanRecord) -> tuple[dict | None, list[float] | None]:
    """WGS84 footprint and bbox; the bbox covers both the outline and every point.

    The outline may leave out stray points (specks are dropped to keep it small), so the bbox
    comes from the native bbox reprojected, widened to the outline's cells where they stick out.
    A scan in a local frame has neither (STAC: geometry null, no bbox); ``proj:bbox`` keeps its box.
    """
    if is_local(record.crs_wkt):
        return None, None
    xmin, ymin, _, xmax, ymax, _ = record.bbox
    points_box = box(*_to_wgs84(record.crs_wkt).transform_bounds(xmin, ymin, xmax, ymax, densify_pts=21))
    geom = shape(record.footprint) if record.footprint else points_box
    return mapping(geom), [float(v) for v in geom.union(points_box).bounds]


def _projection(record: ScanRecord) -> dict[str, Any]:
    return {
        "proj:code": record.crs_code,
        "proj:wkt2": record.crs_wkt,
        "proj:bbox": [float(v) for v in record.bbox],
    }


def _pointcloud(record: ScanRecord, geometry: dict | None) -> dict[str, Any]:
    if geometry is None:  # local frame: the native box's area, in the frame's square units
        area = (record.bbox[3] - record.bbox[0]) * (record.bbox[4] - record.bbox[1])
    else:
        area, _ = Geod(ellps="WGS84").geometry_area_perimeter(shape(geometry))
    schemas, stats = [], []
    for position, col in enumerate(record.columns):
        kind = _pc_type(col)
        if kind is None:
            continue  # text columns have no pointcloud dimension type
        schemas.append({"name": col.name, "size": int(col.size), "type": kind})
        stat: dict[str, Any] = {"name": col.name, "position": position, "count": record.point_count}
        for key, value in (
            ("minimum", col.minimum),
            ("maximum", col.maximum),
            ("average", col.mean),
            ("stddev", col.stddev),
        ):
            if value is not None:
                stat[key] = float(value)
        if col.stddev is not None:
            stat["variance"] = float(col.stddev) ** 2
        stats.append(stat)
    return {
        "pc:count": int(record.point_count),
        "pc:type": "lidar",
        "pc:density": record.point_count / abs(area) if area else 0.0,  # points per m²
        "pc:schemas": schemas,
        "pc:statistics": stats,
    }


def _pc_type(col: ColumnInfo) -> str | None:
    """Map an Arrow type string onto the pointcloud extension's floating/signed/unsigned."""
    t = col.type.lower()
    if t.startswith(("float", "double", "halffloat", "decimal")):
        # Decimal coordinates are stored as scaled integers but mean real numbers.
        return "floating"
    if t.startswith("uint") or t == "bool":
        return "unsigned"
    if t.startswith(("int", "timestamp", "duration", "date")):
        return "signed"
    return None


def _own_fields(record: ScanRecord) -> dict[str, Any]:
    p = ext.PREFIX
    fields: dict[str, Any] = {
        f"{p}station": record.station,
        f"{p}duration": max(0.0, record.duration_seconds),
        f"{p}source_path": record.source_path,
        f"{p}source_checksum": multihash_sha256(record.source_sha256),
        f"{p}source_format": record.source_format,
        f"{p}row_groups": int(record.row_groups),
        f"{p}partial": bool(record.partial),
        **({f"{p}time_source": record.time_source,
            f"{p}time_approximate": record.time_source in APPROXIMATE_TIMES} if record.time_source else {}),
        f"{p}problems": list(record.problems),
    }
    if record.scanner_origin is not None:
        fields[f"{p}scanner_origin"] = [float(v) for v in record.scanner_origin]
    return fields
