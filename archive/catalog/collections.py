"""The shelf's root Catalog and its two Collections: scans (one Item each) and grids (cubes).

Extents and summaries are recomputed from all Items every time, so they always cover them.
License and providers come from the site file's [catalog] table; when unset they say so plainly
instead of inventing values.
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping
from dataclasses import dataclass, field
from datetime import datetime, timezone
from typing import Any

import pyarrow as pa
import pyarrow.compute as pc
import pystac
from pyproj import CRS, Transformer

from archive.catalog import extensions as ext
from archive.catalog.items import JSON, PARQUET, SCANS_ID, ZARR
from archive.catalog.store import relative_href
from archive.frames import is_local
from archive.layout import CATALOG, GRIDS_COLLECTION, SCANS_COLLECTION, SCANS_INDEX

GRIDS_ID = "grids"
SHELF_ID = "shelf"
LICENSE_PLACEHOLDER = "License not set: add `license` to the site file's [catalog] table."
PROVIDER_PLACEHOLDER = "Provider not set: add [[catalog.providers]] to the site file"
TITLE_PLACEHOLDER = "Untitled shelf (set `title` in the site file's [catalog] table)"


@dataclass(frozen=True)
class GridInfo:
    """What the catalog needs to know about one Zarr cube on the shelf."""

    href: str  # shelf-relative, e.g. "grids/north.zarr"
    station: str
    product: str  # "elevation", "displacement", ...
    variables: Mapping[str, Mapping[str, Any]]  # name -> {"dimensions", "unit", "description"}
    dims: Mapping[str, int]  # dimension name -> length
    start: datetime | None  # first and last time step (UTC)
    end: datetime | None
    bbox: tuple[float, float, float, float]  # native xmin ymin xmax ymax
    crs_wkt: str
    crs_code: str | None = None
    cell: float | None = None  # metres
    size: int | None = None  # total bytes of the store, when known
    checksum: str | None = None  # multihash of the store's tree digest, when known
    extra: Mapping[str, Any] = field(default_factory=dict)

    @classmethod
    def coerce(cls, value: "GridInfo | Mapping[str, Any]") -> "GridInfo":
        """Accept a GridInfo or a dict (``time_extent``/``spatial_extent``/``crs`` aliases)."""
        if isinstance(value, GridInfo):
            return value
        d = dict(value)
        if "time_extent" in d:
            d["start"], d["end"] = d.pop("time_extent")
        if "spatial_extent" in d:
            d["bbox"] = d.pop("spatial_extent")
        if "crs" in d:
            crs = CRS.from_user_input(d.pop("crs"))
            d.setdefault("crs_wkt", crs.to_wkt())
            auth = crs.to_authority()
            d.setdefault("crs_code", f"{auth[0]}:{auth[1]}" if auth else None)
        if isinstance(d.get("variables"), (list, tuple)):
            d["variables"] = {v: {} for v in d["variables"]}
        for k in ("start", "end"):
            if isinstance(d.get(k), str):
                d[k] = datetime.fromisoformat(d[k].replace("Z", "+00:00"))
        d["bbox"] = tuple(float(v) for v in d["bbox"][:2]) + tuple(float(v) for v in d["bbox"][-2:])
        known = set(cls.__dataclass_fields__)
        d["extra"] = {**d.get("extra", {}), **{k: d.pop(k) for k in list(d) if k not in known}}
        return cls(**d)


def _iso(t: datetime) -> str:
    return t.astimezone(timezone.utc).isoformat().replace("+00:00", "Z")


def _license(settings: Mapping[str, Any]) -> tuple[str, str]:
    lic = settings.get("license")
    return (lic, "") if lic else ("other", " " + LICENSE_PLACEHOLDER)


def _providers(settings: Mapping[str, Any]) -> list[pystac.Provider]:
    given = settings.get("providers") or []
    if not given:
        return [pystac.Provider(name=PROVIDER_PLACEHOLDER, roles=["producer"])]
    return [
        pystac.Provider(
            name=p["name"], description=p.get("description"), roles=p.get("roles"), url=p.get("url")
        )
        for p in given
    ]


def _links(here: str, targets: Iterable[tuple[str, str, str | None]]) -> list[pystac.Link]:
    return [
        pystac.Link(rel, relative_href(here, to), media_type=JSON, title=title)
        for rel, to, title in targets
    ]


def _extent(corner: dict) -> list[float]:
    """WGS84 extent of the georeferenced Items; the whole Earth when all are in local frames (STAC
    requires a spatial extent, and a local frame cannot be placed)."""
    box = [pc.min(corner["xmin"]).as_py(), pc.min(corner["ymin"]).as_py(),
           pc.max(corner["xmax"]).as_py(), pc.max(corner["ymax"]).as_py()]
    return [-180.0, -90.0, 180.0, 90.0] if None in box else box


def scans_collection(index: pa.Table, settings: Mapping[str, Any]) -> dict[str, Any]:
    """Collection of all scan Items, computed from the search index's columns (no Item JSON parsed)."""
    if index.num_rows == 0:
        raise ValueError("a scans collection needs at least one Item")
    bbox = index.column("bbox")
    corner = {k: pc.struct_field(bbox, k) for k in ("xmin", "ymin", "xmax", "ymax")}
    starts = pc.coalesce(index.column("start_datetime"), index.column("datetime"))
    ends = pc.coalesce(index.column("end_datetime"), index.column("datetime"))
    stations = index.column("scanshelf:station").to_pylist()
    counts = pc.min_max(index.column("pc:count"))
    codes = sorted(c for c in pc.unique(index.column("proj:code")).to_pylist() if c)
    license_id, license_note = _license(settings)
    coll = pystac.Collection(
        id=SCANS_ID,
        title=f"{settings.get('title') or TITLE_PLACEHOLDER}: scans",
        description=(
            "Terrestrial laser scans, one Item per scan, points as Hilbert-sorted Parquet."
            + license_note
        ),
        extent=pystac.Extent(
            pystac.SpatialExtent([_extent(corner)]),
            pystac.TemporalExtent([[pc.min(starts).as_py(), pc.max(ends).as_py()]]),
        ),
        license=license_id,
        providers=_providers(settings),
        summaries=pystac.Summaries(
            {
                f"{ext.PREFIX}station": sorted(set(stations)),
                "pc:count": {"minimum": counts["min"].as_py(), "maximum": counts["max"].as_py()},
                "pc:type": ["lidar"],
                **({"proj:code": codes} if codes else {}),
            }
        ),
    )
    for link in _links(SCANS_COLLECTION, [("root", CATALOG, "Shelf catalog"), ("parent", CATALOG, "Shelf catalog")]):
        coll.add_link(link)
    coll.add_link(
        pystac.Link(
            "alternate",
            relative_href(SCANS_COLLECTION, SCANS_INDEX),
            media_type=PARQUET,
            title="All Items as STAC-GeoParquet (search index)",
        )
    )
    for station, scan_id in zip(stations, index.column("id").to_pylist()):  # index order: station, time
        coll.add_link(pystac.Link("item", f"./items/{station}/{scan_id}.json", media_type="application/geo+json"))
    return coll.to_dict(include_self_link=False, transform_hrefs=False)


def grids_collection(
    grids: list[GridInfo], settings: Mapping[str, Any], fallback_extent: dict[str, Any]
) -> dict[str, Any]:
    """Collection whose assets are the Zarr cubes, described with datacube fields.

    ``fallback_extent`` (the scans' extent dict) is used while there are no cubes yet.
    """
    license_id, license_note = _license(settings)
    placed = [g for g in grids if not is_local(g.crs_wkt)]  # a local frame cannot be placed on the Earth
    if grids:
        boxes = [_wgs84_bbox(g) for g in placed] or [[-180.0, -90.0, 180.0, 90.0]]
        times = [t for g in grids for t in (g.start, g.end) if t is not None]
        extent = pystac.Extent(
            pystac.SpatialExtent([[min(b[0] for b in boxes), min(b[1] for b in boxes),
                                   max(b[2] for b in boxes), max(b[3] for b in boxes)]]),
            pystac.TemporalExtent([[min(times) if times else None, max(times) if times else None]]),
        )
    else:
        extent = pystac.Extent.from_dict(fallback_extent)
    coll = pystac.Collection(
        id=GRIDS_ID,
        title=f"{settings.get('title') or TITLE_PLACEHOLDER}: grids",
        description=(
            "Gridded products per station as Zarr v3 cubes (time, y, x); each cube is an asset."
            + license_note
        ),
        extent=extent,
        license=license_id,
        providers=_providers(settings),
        stac_extensions=[ext.DATACUBE, ext.FILE, ext.SCANSHELF],
        summaries=pystac.Summaries({f"{ext.PREFIX}station": sorted({g.station for g in grids})} if grids else {}),
    )
    for link in _links(GRIDS_COLLECTION, [("root", CATALOG, "Shelf catalog"), ("parent", CATALOG, "Shelf catalog")]):
        coll.add_link(link)
    for g in sorted(grids, key=lambda g: g.href):
        coll.add_asset(_asset_key(g), _cube_asset(g))
    return coll.to_dict(include_self_link=False, transform_hrefs=False)


def _asset_key(g: GridInfo) -> str:
    return g.station if g.product == "elevation" else f"{g.station}-{g.product}"


def _wgs84_bbox(g: GridInfo) -> list[float]:
    tf = Transformer.from_crs(CRS.from_wkt(g.crs_wkt), CRS.from_epsg(4326), always_xy=True)
    return list(tf.transform_bounds(*g.bbox, densify_pts=21))


def _reference_system(g: GridInfo) -> int | str:
    if g.crs_code and g.crs_code.upper().startswith("EPSG:"):
        return int(g.crs_code.split(":")[1])
    return g.crs_wkt


def _cube_asset(g: GridInfo) -> pystac.Asset:
    dims: dict[str, Any] = {}
    for name, length in g.dims.items():
        if name in ("x", "y"):
            lo, hi = (g.bbox[0], g.bbox[2]) if name == "x" else (g.bbox[1], g.bbox[3])
            dims[name] = {"type": "spatial", "axis": name, "extent": [lo, hi], "reference_system": _reference_system(g)}
            if g.cell:
                dims[name]["step"] = float(g.cell)
        elif name == "time":
            dims[name] = {
                "type": "temporal",
                "extent": [_iso(g.start) if g.start else None, _iso(g.end) if g.end else None],
                "step": None,  # one step per scan: irregular
            }
        else:
            dims[name] = {"type": "other", "extent": [0, max(0, int(length) - 1)], "step": 1}
    variables = {
        name: {
            "dimensions": list(v.get("dimensions", list(g.dims))),
            "type": v.get("type", "data"),
            **({"unit": v["unit"]} if v.get("unit") else {}),
            **({"description": v["description"]} if v.get("description") else {}),
        }
        for name, v in g.variables.items()
    }
    extra: dict[str, Any] = {"cube:dimensions": dims, "cube:variables": variables}
    if g.size is not None:
        extra["file:size"] = int(g.size)
    if g.checksum is not None:
        extra[f"{ext.PREFIX}store_checksum"] = g.checksum
    extra[f"{ext.PREFIX}station"] = g.station
    return pystac.Asset(
        href=relative_href(GRIDS_COLLECTION, g.href),
        media_type=ZARR,
        roles=["data"],
        title=f"{g.station} {g.product} cube",
        extra_fields=extra,
    )


def root_catalog(settings: Mapping[str, Any], has_grids: bool = True) -> dict[str, Any]:
    """The root Catalog: the entry point a reader opens first, so it is written last."""
    cat = pystac.Catalog(
        id=SHELF_ID,
        title=settings.get("title") or TITLE_PLACEHOLDER,
        description=settings.get("description")
        or "A scanshelf shelf: repeated terrestrial laser scans as Parquet points, Zarr grids "
        "and this STAC catalog. Check the licence and the data's fitness before relying on it "
        "for hazard decisions.",
    )
    cat.add_link(pystac.Link("root", "./" + CATALOG, media_type=JSON, title="Shelf catalog"))
    cat.add_link(pystac.Link("child", "./" + SCANS_COLLECTION, media_type=JSON, title="Scans"))
    if has_grids:
        cat.add_link(pystac.Link("child", "./" + GRIDS_COLLECTION, media_type=JSON, title="Grids"))
    return cat.to_dict(include_self_link=False, transform_hrefs=False)
