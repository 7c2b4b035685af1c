"""The search index: every scan Item as one row of ``scans/items.parquet`` (STAC-GeoParquet).

A search by area and time reads a few small columns and, thanks to the sort by station and
time and small row groups, only the row groups whose statistics intersect; the full Item JSON
rides along in ``item_json`` so readers rebuild pystac Items without fetching each file.
Asset hrefs here are relative to the shelf ROOT (not to the Item file); the file's key-value
metadata says so under ``scanshelf``.
"""

from __future__ import annotations

import hashlib
import io
import json
from collections.abc import Iterable
from datetime import datetime
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq
import shapely
from shapely.geometry import shape

from archive.catalog import extensions as ext
from archive.catalog.store import ShelfFiles, multihash_sha256, resolve_href
from archive.layout import SCANS_INDEX, ScanId, item_path

ROW_GROUP_ROWS = 256  # a few hundred Items: a `find` by station and time reads one or two groups
GEOPARQUET_VERSION = "1.1.0"
STAC_GEOPARQUET_VERSION = "1.0.0"  # version string of the STAC-GeoParquet metadata key (from memory)

_ASSET = pa.struct(
    [
        ("href", pa.string()),
        ("type", pa.string()),
        ("file:size", pa.int64()),
        ("file:checksum", pa.string()),
    ]
)
_TIME = pa.timestamp("us", tz="UTC")

SCHEMA = pa.schema(
    [
        ("id", pa.string()),
        ("collection", pa.string()),
        ("type", pa.string()),
        ("stac_version", pa.string()),
        ("stac_extensions", pa.list_(pa.string())),
        ("datetime", _TIME),
        ("start_datetime", _TIME),
        ("end_datetime", _TIME),
        ("geometry", pa.binary()),
        ("bbox", pa.struct([(k, pa.float64()) for k in ("xmin", "ymin", "xmax", "ymax")])),
        ("scanshelf:station", pa.string()),
        ("proj:code", pa.string()),
        ("proj:bbox", pa.list_(pa.float64())),
        ("pc:count", pa.int64()),
        ("scanshelf:partial", pa.bool_()),
        ("assets", pa.struct([("points", _ASSET), ("thumbnail", _ASSET)])),
        ("item_json", pa.string()),
    ]
)


def _time(text: str | None) -> datetime | None:
    return datetime.fromisoformat(text.replace("Z", "+00:00")) if text else None


def _asset_row(item_file: str, asset: dict[str, Any] | None) -> dict[str, Any] | None:
    if asset is None:
        return None
    return {
        "href": resolve_href(item_file, asset["href"]),
        "type": asset.get("type"),
        "file:size": asset.get("file:size"),
        "file:checksum": asset.get("file:checksum"),
    }


def sort_index(table: pa.Table) -> pa.Table:
    """Station, then time, then id: the order the index promises and its row-group pruning needs."""
    keys = [("scanshelf:station", "ascending"), ("datetime", "ascending"), ("id", "ascending")]
    return table.take(pc.sort_indices(table, sort_keys=keys))


def index_table(items: list[dict[str, Any]]) -> pa.Table:
    """Rows in index order, built from exactly the Item dicts written as JSON."""
    rows = []
    for item in items:
        p = item["properties"]
        here = item_path(ScanId.parse(item["id"]))
        b = item.get("bbox")  # None for a scan in a local frame (geometry null)
        xmin, ymin, xmax, ymax = ((b[0], b[1], b[3], b[4]) if len(b) == 6 else b) if b else (None,) * 4
        rows.append(
            {
                "id": item["id"],
                "collection": item.get("collection"),
                "type": item["type"],
                "stac_version": item["stac_version"],
                "stac_extensions": item.get("stac_extensions", []),
                "datetime": _time(p.get("datetime")),
                "start_datetime": _time(p.get("start_datetime")),
                "end_datetime": _time(p.get("end_datetime")),
                "geometry": shapely.to_wkb(shape(item["geometry"]), flavor="iso") if item.get("geometry") else None,
                "bbox": {"xmin": xmin, "ymin": ymin, "xmax": xmax, "ymax": ymax} if b else None,
                "scanshelf:station": p[f"{ext.PREFIX}station"],
                "proj:code": p.get("proj:code"),
                "proj:bbox": p.get("proj:bbox"),
                "pc:count": p["pc:count"],
                "scanshelf:partial": bool(p.get(f"{ext.PREFIX}partial", False)),
                "assets": {
                    "points": _asset_row(here, item["assets"].get("points")),
                    "thumbnail": _asset_row(here, item["assets"].get("thumbnail")),
                },
                "item_json": json.dumps(item, separators=(",", ":"), ensure_ascii=False),
            }
        )
    return sort_index(pa.Table.from_pylist(rows, schema=SCHEMA))


def merge_index(old: pa.Table | None, items: list[dict[str, Any]], drop: Iterable[str] = ()) -> pa.Table:
    """``old`` less the rows of ``drop`` and of ``items``, plus ``items``.

    Only the new Items are turned into rows, so an update of a big shelf costs the new Items,
    not a parse of every Item JSON. An index of another layout is rebuilt from its ``item_json``.
    """
    new = index_table(items)
    if old is None or old.num_rows == 0:
        return new
    try:
        old = old.select(SCHEMA.names).cast(SCHEMA)
    except (KeyError, pa.ArrowInvalid, pa.ArrowNotImplementedError):
        old = index_table([json.loads(t) for t in old.column("item_json").to_pylist()])
    gone = pa.array(sorted(set(drop) | set(new.column("id").to_pylist())), pa.string())
    kept = old.filter(pc.invert(pc.is_in(old.column("id"), value_set=gone)))
    return sort_index(pa.concat_tables([kept, new]))


def items_of(table: pa.Table, ids: Iterable[str]) -> dict[str, dict[str, Any]]:
    """The Item dicts of ``ids`` (those the table holds), parsed from ``item_json``."""
    rows = table.filter(pc.is_in(table.column("id"), value_set=pa.array(sorted(set(ids)), pa.string())))
    return {i: json.loads(t) for i, t in zip(rows.column("id").to_pylist(), rows.column("item_json").to_pylist())}


def points_checksums(shelf: ShelfFiles) -> dict[str, str | None]:
    """Scan id → the points asset's ``file:checksum`` per the index, read from two columns only."""
    if not shelf.exists(SCANS_INDEX):
        return {}
    table = read_index(shelf, ["id", "assets"])
    points = pc.struct_field(table.column("assets"), "points")
    sums = pc.struct_field(points, "file:checksum")
    return dict(zip(table.column("id").to_pylist(), sums.to_pylist()))


def _file_metadata(table: pa.Table, collection: dict[str, Any] | None) -> dict[bytes, bytes]:
    geoms = shapely.from_wkb(table.column("geometry").drop_null().to_numpy(zero_copy_only=False))
    types = sorted({g.geom_type for g in geoms}) if len(geoms) else []
    bounds = list(shapely.total_bounds(geoms)) if len(geoms) else []
    geo = {
        "version": GEOPARQUET_VERSION,
        "primary_column": "geometry",
        "columns": {
            "geometry": {
                "encoding": "WKB",
                "geometry_types": types,
                # no "crs" key: GeoParquet's default is OGC:CRS84 (lon/lat), as GeoJSON
                "bbox": bounds,
                "covering": {
                    "bbox": {k: ["bbox", k] for k in ("xmin", "ymin", "xmax", "ymax")}
                },
            }
        },
    }
    stac_meta: dict[str, Any] = {"version": STAC_GEOPARQUET_VERSION}
    if collection is not None:
        stac_meta["collections"] = {collection["id"]: collection}
    own = {
        "asset_hrefs": "relative to the shelf root (unlike the Item JSON, whose hrefs are "
        "relative to the Item file)",
        "item_json": "the full Item exactly as written to scans/items/<station>/<id>.json",
        "sort": ["scanshelf:station", "datetime"],
    }
    return {
        b"geo": json.dumps(geo).encode(),
        b"stac-geoparquet": json.dumps(stac_meta).encode(),
        b"scanshelf": json.dumps(own).encode(),
    }


def write_index(shelf: ShelfFiles, table: pa.Table, collection: dict[str, Any] | None = None) -> tuple[int, str]:
    """Write ``scans/items.parquet`` (an :func:`index_table`) atomically; returns its size and multihash."""
    table = table.replace_schema_metadata(_file_metadata(table, collection))
    buf = io.BytesIO()
    pq.write_table(
        table,
        buf,
        row_group_size=ROW_GROUP_ROWS,
        compression="zstd",
        write_statistics=True,
        use_dictionary=["collection", "scanshelf:station", "proj:code", "type", "stac_version"],
    )
    data = buf.getvalue()
    shelf.write_bytes(SCANS_INDEX, data)
    return len(data), multihash_sha256(hashlib.sha256(data).hexdigest())


def read_index(shelf: ShelfFiles, columns: list[str] | None = None) -> pa.Table:
    """The index as an Arrow table (all columns unless ``columns`` is given)."""
    with shelf.fs.open(shelf.path(SCANS_INDEX), "rb") as f:
        return pq.read_table(f, columns=columns)


_PRUNE = ("bbox.xmin", "bbox.ymin", "bbox.xmax", "bbox.ymax", "start_datetime", "end_datetime", "scanshelf:station")


def search_index(
    shelf: ShelfFiles,
    bbox: tuple[float, float, float, float] | None = None,
    start: datetime | None = None,
    end: datetime | None = None,
    station: str | None = None,
) -> list[str]:
    """Ids of the Items whose bbox (WGS84) and [start_datetime, end_datetime] meet the query.

    Row groups are skipped on their min/max statistics before anything is read, so a search
    reads the footer and the one or two groups of the matching station and period.
    """
    with shelf.fs.open(shelf.path(SCANS_INDEX), "rb", cache_type="none") as f:
        pf = pq.ParquetFile(f)
        md = pf.metadata
        where = {md.schema.column(i).path: i for i in range(md.num_columns)}
        cols = {name: where[name] for name in _PRUNE if name in where}
        groups = [g for g in range(md.num_row_groups) if _may_match(md.row_group(g), cols, bbox, start, end, station)]
        table = pf.read_row_groups(groups, columns=["id", "bbox", "start_datetime", "end_datetime", "scanshelf:station"])
    keep = pa.array(np.ones(table.num_rows, bool))
    for cond in _conditions(table, bbox, start, end, station):
        keep = pc.and_(keep, cond)
    return table.filter(keep).column("id").to_pylist()


def _may_match(rg: pq.RowGroupMetaData, cols: dict[str, int], bbox, start, end, station) -> bool:
    st = {}
    for name, i in cols.items():
        stats = rg.column(i).statistics
        if stats is not None and stats.has_min_max:
            st[name] = stats

    def below(col: str, value: Any) -> bool:  # every value in the group is < value
        return col in st and st[col].max < value

    def above(col: str, value: Any) -> bool:  # every value in the group is > value
        return col in st and st[col].min > value

    if bbox is not None:
        w, s, e, n = bbox
        if below("bbox.xmax", w) or above("bbox.xmin", e) or below("bbox.ymax", s) or above("bbox.ymin", n):
            return False
    if start is not None and below("end_datetime", start):
        return False
    if end is not None and "start_datetime" in st and st["start_datetime"].min >= end:
        return False
    if station is not None and (below("scanshelf:station", station) or above("scanshelf:station", station)):
        return False
    return True


def _conditions(table: pa.Table, bbox, start, end, station):
    if bbox is not None:
        w, s, e, n = bbox
        b = table.column("bbox").combine_chunks()
        yield pc.greater_equal(b.field("xmax"), w)
        yield pc.less_equal(b.field("xmin"), e)
        yield pc.greater_equal(b.field("ymax"), s)
        yield pc.less_equal(b.field("ymin"), n)
    if start is not None:
        yield pc.greater_equal(table.column("end_datetime"), pa.scalar(start, _TIME))
    if end is not None:
        yield pc.less(table.column("start_datetime"), pa.scalar(end, _TIME))
    if station is not None:
        yield pc.equal(table.column("scanshelf:station"), station)
