"""The shelf's STAC catalog: written by build_catalog, checked offline, kept in step with the index.

Shelves here are tiny and hand-made: real Parquet point files written by the test, a PNG
preview and a small Zarr v3 cube, described by hand-made ScanRecords.
"""

from __future__ import annotations

import hashlib
import json
import shutil
from dataclasses import replace
from datetime import datetime, timedelta, timezone
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pystac
import pytest
from affine import Affine
from pyproj import CRS
from shapely.geometry import box, shape

from archive.catalog import build_catalog, outline, update_catalog, verify_shelf
from archive.catalog import extensions as ext
from archive.catalog import schema as stac_schema
from archive.layout import ScanId, grid_path, item_path, points_path, preview_path
from archive.records import ColumnInfo, ScanRecord

CRS_CODE = "EPSG:32633"  # a projected metric CRS; the site inside it is fictional
WKT = CRS.from_user_input(CRS_CODE).to_wkt()
X0, Y0 = 500000.0, 7650000.0
T0 = datetime(2026, 9, 1, 6, 0, tzinfo=timezone.utc)
SETTINGS = {
    "license": "CC-BY-4.0",
    "title": "Test site scans",
    "providers": [{"name": "Test Lab", "roles": ["producer", "host"], "url": "https://example.org"}],
}
CELL = 5.0


def _points(n: int, seed: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """An L-shaped patch: a 20 m wide leg north and a 20 m wide leg east of the corner."""
    rng = np.random.default_rng(seed)
    leg = rng.random(n) < 0.5
    x = np.round(np.where(leg, rng.uniform(0, 20, n), rng.uniform(0, 100, n)) + X0, 3)
    y = np.round(np.where(leg, rng.uniform(0, 100, n), rng.uniform(0, 20, n)) + Y0, 3)
    z = np.round(rng.normal(200, 3, n), 3)
    return x, y, z


def _mask(x: np.ndarray, y: np.ndarray) -> tuple[np.ndarray, Affine]:
    """Occupancy of CELL-sized cells, north-up, as migrate keeps it while streaming."""
    nx, ny = 20, 20
    tf = Affine(CELL, 0, X0, 0, -CELL, Y0 + ny * CELL)
    cols = ((x - X0) // CELL).astype(int)
    rows = ((Y0 + ny * CELL - y) // CELL).astype(int)
    mask = np.zeros((ny, nx), bool)
    mask[rows.clip(0, ny - 1), cols.clip(0, nx - 1)] = True
    return mask, tf


def make_scan(root: Path, station: str, start: datetime, n: int = 2000, seed: int = 0,
              preview: bool = False, grid: bool = False, partial: bool = False) -> ScanRecord:
    """Write a scan's Parquet (and preview) under ``root`` and return its ScanRecord."""
    scan = ScanId(station, start)
    x, y, z = _points(n, seed)
    gps = np.sort(np.random.default_rng(seed).uniform(0, 600, n))
    dec = pa.decimal128(18, 3)
    table = pa.table(
        {
            "x": pa.array(x).cast(dec),
            "y": pa.array(y).cast(dec),
            "z": pa.array(z).cast(dec),
            "intensity": pa.array(np.random.default_rng(seed).integers(0, 65535, n), pa.uint16()),
            "gps_time": pa.array(gps),
        }
    )
    rel = points_path(scan)
    (root / rel).parent.mkdir(parents=True, exist_ok=True)
    pq.write_table(table, root / rel, row_group_size=n // 4)
    data = (root / rel).read_bytes()
    if preview:
        import matplotlib

        matplotlib.use("Agg")
        import matplotlib.pyplot as plt

        (root / preview_path(scan)).parent.mkdir(parents=True, exist_ok=True)
        plt.imsave(root / preview_path(scan), np.random.default_rng(seed).random((16, 16)))
    mask, tf = _mask(x, y)
    stat = lambda v: (float(v.min()), float(v.max()), float(v.mean()), float(v.std()))  # noqa: E731
    return ScanRecord(
        scan_id=str(scan),
        station=station,
        start=start,
        end=start + timedelta(seconds=float(gps.max())),
        first_point_time=start + timedelta(seconds=float(gps.min())),
        crs_wkt=WKT,
        crs_code=CRS_CODE,
        bbox=(float(x.min()), float(y.min()), float(z.min()), float(x.max()), float(y.max()), float(z.max())),
        point_count=n,
        points_href=rel,
        points_size=len(data),
        points_sha256=hashlib.sha256(data).hexdigest(),
        row_groups=pq.ParquetFile(root / rel).num_row_groups,
        columns=(
            ColumnInfo("x", "decimal128(18, 3)", 8, *stat(x)),
            ColumnInfo("y", "decimal128(18, 3)", 8, *stat(y)),
            ColumnInfo("z", "decimal128(18, 3)", 8, *stat(z)),
            ColumnInfo("intensity", "uint16", 2, 0.0, 65535.0),
            ColumnInfo("gps_time", "double", 8),
        ),
        source_path=f"{station}/{scan.time:%Y%m%d_%H%M%S}.las",
        source_sha256=hashlib.sha256(f"source {scan}".encode()).hexdigest(),
        source_format="las",
        partial=partial,
        problems=("12 points with NaN coordinates dropped",) if partial else (),
        scanner_origin=(X0 + 10.0, Y0 + 10.0, 212.5),
        footprint=outline(mask, tf, WKT),
        preview_href=preview_path(scan) if preview else None,
        grid_href=grid_path(station) if grid else None,
    )


def make_cube(root: Path, station: str, times: list[datetime]) -> dict:
    """A small Zarr v3 elevation cube, described the way migrate hands grids to the catalog."""
    import xarray as xr

    ny, nx = 20, 20
    xs = X0 + CELL * (np.arange(nx) + 0.5)
    ys = Y0 + CELL * (np.arange(ny)[::-1] + 0.5)
    ds = xr.Dataset(
        {
            "elevation": (("time", "y", "x"), np.full((len(times), ny, nx), 200, np.float32),
                          {"units": "m", "long_name": "mean elevation", "grid_mapping": "spatial_ref"}),
            "point_count": (("time", "y", "x"), np.ones((len(times), ny, nx), np.uint32),
                            {"units": "1", "long_name": "points per cell"}),
        },
        coords={"time": [t.replace(tzinfo=None) for t in times], "y": ys, "x": xs,
                "spatial_ref": ((), 0, {"crs_wkt": WKT})},
    )
    ds.to_zarr(root / grid_path(station), zarr_format=3, consolidated=True, mode="w")
    return {
        "href": grid_path(station),
        "station": station,
        "product": "elevation",
        "variables": {
            "elevation": {"dimensions": ["time", "y", "x"], "unit": "m", "description": "mean elevation"},
            "point_count": {"dimensions": ["time", "y", "x"], "unit": "1"},
        },
        "dims": {"time": len(times), "y": ny, "x": nx},
        "time_extent": [min(times), max(times)],
        "spatial_extent": [X0, Y0, X0 + nx * CELL, Y0 + ny * CELL],
        "crs": CRS_CODE,
        "cell": CELL,
    }


@pytest.fixture
def shelf(tmp_path: Path) -> tuple[Path, list[ScanRecord], list[dict]]:
    root = tmp_path / "shelf"
    records = [
        make_scan(root, "north", T0, seed=1, preview=True, grid=True),
        make_scan(root, "north", T0 + timedelta(days=7), seed=2, grid=True),
        make_scan(root, "south", T0 + timedelta(days=1), seed=3, partial=True),
    ]
    grids = [make_cube(root, "north", [T0, T0 + timedelta(days=7)])]
    build_catalog(str(root), records, grids, SETTINGS)
    return root, records, grids


def _docs(root: Path) -> dict[str, dict]:
    return {str(p.relative_to(root)): json.loads(p.read_text()) for p in sorted(root.rglob("*.json"))
            if ".zarr" not in str(p)}


def test_layout_written_and_catalog_last(tmp_path: Path) -> None:
    root = tmp_path / "s"
    no_outline = replace(make_scan(root, "east", T0, seed=2), footprint=None)  # falls back to the bbox
    records = [make_scan(root, "north", T0, seed=1), no_outline]
    result = build_catalog(str(root), records, [], SETTINGS)
    assert result.written[-1] == "catalog.json"
    assert set(result.written) == {
        item_path(ScanId.parse(r.scan_id)) for r in records
    } | {"scans/collection.json", "grids/collection.json", "scans/items.parquet", "catalog.json"}
    assert not list(root.rglob("*.part-*")), "temporary files left behind"
    east = json.loads((root / item_path(ScanId.parse(no_outline.scan_id))).read_text())
    assert shape(east["geometry"]).equals(box(*east["bbox"]))
    assert verify_shelf(str(root)).ok


def test_verify_passes_on_fresh_shelf(shelf) -> None:
    root, records, _ = shelf
    report = verify_shelf(str(root))
    assert report.ok, report.summary()
    assert report.documents == 1 + 2 + len(records)  # catalog, two collections, items
    assert report.assets == len(records) + 1 + 1  # points, one thumbnail, one cube


def test_core_schemas_come_from_the_pystac_package(shelf) -> None:
    # reference: STAC 1.1 core JSON Schemas as shipped inside the installed pystac package
    root, _, _ = shelf
    shipped = Path(pystac.__file__).parent / "validation" / "jsonschemas" / "stac-spec" / "v1.1.0"
    assert (shipped / "item.json").is_file()
    assert not list(Path(ext.SCHEMA_DIR).rglob("item.json")), "core schemas must not be copied here"
    for path, doc in _docs(root).items():
        assert stac_schema.core_problems(doc) == [], path
    item = _docs(root)[item_path(ScanId("north", T0))]
    del item["properties"]["datetime"]  # STAC 1.1: datetime is required (may be null)
    assert stac_schema.core_problems(item)
    collection = _docs(root)["scans/collection.json"]
    del collection["extent"]
    assert stac_schema.core_problems(collection)


def test_stac_pydantic_parses_every_item_and_collection(shelf) -> None:
    # reference: stac-pydantic, an independent implementation of the STAC core models
    from stac_pydantic import Catalog, Collection, Item

    root, records, _ = shelf
    kinds = {"Feature": Item, "Collection": Collection, "Catalog": Catalog}
    parsed = [kinds[doc["type"]].model_validate(doc) for doc in _docs(root).values()]
    assert sum(isinstance(p, Item) for p in parsed) == len(records)
    assert sum(isinstance(p, Collection) for p in parsed) == 2


def test_pystac_round_trip_and_href_resolution(shelf) -> None:
    root, records, _ = shelf
    for path, doc in _docs(root).items():
        assert stac_schema.roundtrip_problems(doc) == [], path
    cat = pystac.Catalog.from_file(str(root / "catalog.json"))
    items = list(cat.get_items(recursive=True))
    assert sorted(i.id for i in items) == sorted(r.scan_id for r in records)
    for item in items:
        assert Path(item.assets["points"].get_absolute_href()).is_file()


def test_extension_fields_match_our_schemas(shelf) -> None:
    # reference: STAC pointcloud v2.0.0, projection v2.0.0, file v2.1.0, datacube v2.2.0,
    # timestamps v1.1.0 and processing v1.2.0 field definitions (our renderings, offline)
    root, _, _ = shelf
    for path, doc in _docs(root).items():
        assert stac_schema.extension_problems(doc) == [], path
    item = _docs(root)[item_path(ScanId("north", T0))]
    bad = {
        "pc:encoding": "binary",  # removed in pointcloud v2
        "proj:epsg": 32633,  # replaced by proj:code in projection v2
        "scanshelf:colour": "red",  # not one of our fields
    }
    for key, value in bad.items():
        doc = json.loads(json.dumps(item))
        doc["properties"][key] = value
        problems = stac_schema.extension_problems(doc)
        assert len(problems) == 1 and f"'{key}' does not match" in problems[0], problems
    doc = json.loads(json.dumps(item))
    doc["assets"]["points"]["file:checksum"] = "ABC"  # not lowercase hex
    assert stac_schema.extension_problems(doc)
    doc = json.loads(json.dumps(item))
    doc["properties"]["pc:schemas"][0]["type"] = "decimal"  # floating/unsigned/signed only
    assert stac_schema.extension_problems(doc)


def test_item_fields(shelf) -> None:
    root, records, _ = shelf
    rec = records[0]
    item = _docs(root)[item_path(ScanId.parse(rec.scan_id))]
    p = item["properties"]
    assert item["id"] == rec.scan_id
    assert p["datetime"] == "2026-09-01T06:00:00Z"
    assert p["start_datetime"] <= p["end_datetime"]
    assert p["end_datetime"].startswith("2026-09-01T06:")
    assert p["pc:count"] == 2000 and p["pc:type"] == "lidar"
    assert [s["name"] for s in p["pc:schemas"]] == ["x", "y", "z", "intensity", "gps_time"]
    assert p["pc:schemas"][3] == {"name": "intensity", "size": 2, "type": "unsigned"}
    assert p["pc:statistics"][0]["minimum"] == pytest.approx(rec.bbox[0])
    assert "pc:encoding" not in p and "proj:epsg" not in p
    assert p["proj:code"] == CRS_CODE and p["proj:bbox"] == list(rec.bbox)
    assert CRS.from_wkt(p["proj:wkt2"]).to_epsg() == 32633  # reference: pyproj
    assert ext.POINTCLOUD.endswith("/pointcloud/v2.0.0/schema.json")
    assert set(item["stac_extensions"]) >= {ext.POINTCLOUD, ext.PROJECTION, ext.FILE, ext.SCANSHELF}
    assert p["scanshelf:station"] == "north" and p["scanshelf:partial"] is False
    assert p["scanshelf:scanner_origin"] == [X0 + 10.0, Y0 + 10.0, 212.5]
    assert p["scanshelf:duration"] == pytest.approx(rec.duration_seconds)
    assert p["scanshelf:source_checksum"] == "1220" + rec.source_sha256
    assert item["assets"]["points"]["type"] == "application/vnd.apache.parquet"
    assert item["assets"]["points"]["roles"] == ["data"]
    assert item["assets"]["thumbnail"]["roles"] == ["thumbnail"]
    grid = [link for link in item["links"] if link["rel"] == "related"]
    assert grid and grid[0]["type"] == "application/vnd.zarr; version=3"
    assert grid[0]["scanshelf:time_step"] == "2026-09-01T06:00:00Z"
    partial = _docs(root)[item_path(ScanId.parse(records[2].scan_id))]["properties"]
    assert partial["scanshelf:partial"] is True and partial["scanshelf:problems"]
    # density: points per m² of the footprint (reference: pyproj.Geod geodesic area on WGS84 of the
    # Item's own lon/lat ring)
    from pyproj import Geod

    ring = item["geometry"]["coordinates"][0]
    area, _ = Geod(ellps="WGS84").polygon_area_perimeter([c[0] for c in ring], [c[1] for c in ring])
    assert p["pc:density"] == pytest.approx(p["pc:count"] / abs(area), rel=1e-9)
    assert 0.2 < p["pc:density"] < 2000 / (100 * 100) * 5


def test_every_href_is_relative(shelf) -> None:
    # reference: STAC best practice for self-contained catalogs: relative hrefs, no self link
    root, _, _ = shelf
    for path, doc in _docs(root).items():
        hrefs = [l["href"] for l in doc["links"]] + [a["href"] for a in doc.get("assets", {}).values()]
        for href in hrefs:
            assert "://" not in href and not href.startswith("/"), (path, href)
        assert not [l for l in doc["links"] if l["rel"] == "self"], path


def test_file_checksum_is_sha256_multihash(shelf) -> None:
    # reference: multihash spec: varint code 0x12 (sha2-256), varint length 0x20, then the digest
    root, records, _ = shelf
    item = _docs(root)[item_path(ScanId.parse(records[0].scan_id))]
    for key in ("points", "thumbnail"):
        asset = item["assets"][key]
        target = (root / item_path(ScanId.parse(records[0].scan_id))).parent / asset["href"]
        data = target.resolve().read_bytes()
        assert asset["file:checksum"] == "1220" + hashlib.sha256(data).hexdigest()
        assert asset["file:size"] == len(data)


def test_footprint_inside_bbox_and_smaller(shelf) -> None:
    root, records, _ = shelf
    item = _docs(root)[item_path(ScanId.parse(records[0].scan_id))]
    geom, bb = shape(item["geometry"]), box(*item["bbox"])
    assert geom.is_valid
    assert bb.buffer(1e-9).contains(geom)
    assert geom.area < 0.6 * bb.area  # the L covers 36 % of its bbox


def test_relative_hrefs_resolve_after_moving_the_shelf(shelf, tmp_path: Path) -> None:
    root, records, _ = shelf
    moved = tmp_path / "elsewhere" / "copy"
    moved.parent.mkdir()
    shutil.move(str(root), str(moved))
    report = verify_shelf(str(moved))
    assert report.ok, report.summary()
    cat = pystac.Catalog.from_file(str(moved / "catalog.json"))
    hrefs = [i.assets["points"].get_absolute_href() for i in cat.get_items(recursive=True)]
    assert all(h.startswith(str(moved)) and Path(h).is_file() for h in hrefs)


def test_index_columns_and_types(shelf) -> None:
    root, records, _ = shelf
    pf = pq.ParquetFile(root / "scans/items.parquet")
    schema = pf.schema_arrow
    t_utc = pa.timestamp("us", tz="UTC")
    assert schema.field("id").type == pa.string()
    for name in ("datetime", "start_datetime", "end_datetime"):
        assert schema.field(name).type == t_utc
    assert schema.field("geometry").type == pa.binary()
    assert schema.field("bbox").type == pa.struct([(k, pa.float64()) for k in ("xmin", "ymin", "xmax", "ymax")])
    assert schema.field("scanshelf:station").type == pa.string()
    assert schema.field("proj:bbox").type == pa.list_(pa.float64())
    assert schema.field("pc:count").type == pa.int64()
    assert schema.field("scanshelf:partial").type == pa.bool_()
    points = schema.field("assets").type.field("points").type
    assert [f.name for f in points] == ["href", "type", "file:size", "file:checksum"]
    table = pf.read()
    assert table.column("scanshelf:station").to_pylist() == ["north", "north", "south"]
    assert table.column("datetime").to_pylist() == sorted(table.column("datetime").to_pylist()[:2]) + [
        table.column("datetime").to_pylist()[2]
    ]
    for href in table.column("assets").combine_chunks().field("points").field("href").to_pylist():
        assert (root / href).is_file(), href  # index hrefs are relative to the shelf root
    meta = pf.schema_arrow.metadata
    geo = json.loads(meta[b"geo"])  # reference: GeoParquet 1.1 'geo' metadata, bbox covering
    assert geo["version"] == "1.1.0" and geo["primary_column"] == "geometry"
    assert geo["columns"]["geometry"]["encoding"] == "WKB"
    assert geo["columns"]["geometry"]["covering"]["bbox"]["xmin"] == ["bbox", "xmin"]
    assert b"stac-geoparquet" in meta and b"shelf root" in meta[b"scanshelf"]
    rebuilt = pystac.Item.from_dict(json.loads(table.column("item_json")[0].as_py()))
    assert rebuilt.id == records[0].scan_id


def test_duckdb_reads_the_index(shelf) -> None:
    # reference: DuckDB reads the STAC-GeoParquet index as a plain Parquet file
    import duckdb

    root, records, _ = shelf
    lon = json.loads((root / item_path(ScanId.parse(records[0].scan_id))).read_text())["bbox"][0]
    rows = duckdb.sql(
        f"""SELECT id FROM read_parquet('{root / "scans/items.parquet"}')
            WHERE bbox.xmin >= {lon - 1} AND "scanshelf:station" = 'north'
              AND datetime >= TIMESTAMPTZ '2026-09-05 00:00:00+00' ORDER BY id"""
    ).fetchall()
    assert rows == [(records[1].scan_id,)]


def test_corrupt_byte_is_found_and_named(shelf) -> None:
    root, records, _ = shelf
    target = root / records[1].points_href
    data = bytearray(target.read_bytes())
    data[len(data) // 2] ^= 0xFF
    target.write_bytes(bytes(data))
    report = verify_shelf(str(root))
    assert not report.ok
    assert any(records[1].points_href in p and "checksum" in p for p in report.problems), report.problems
    assert verify_shelf(str(root), quick=True).ok  # same size: --quick compares sizes only


def test_changed_cube_is_found(shelf) -> None:
    root, _, _ = shelf
    chunk = next(p for p in (root / "grids/north.zarr/elevation").rglob("*") if p.is_file())
    chunk.write_bytes(chunk.read_bytes() + b"\0")
    report = verify_shelf(str(root))
    assert any("grids/north.zarr" in p for p in report.problems), report.problems


def test_index_out_of_step_is_found(shelf) -> None:
    root, records, _ = shelf
    path = root / item_path(ScanId.parse(records[2].scan_id))
    doc = json.loads(path.read_text())
    doc["properties"]["scanshelf:problems"] = ["edited by hand"]
    path.write_text(json.dumps(doc))
    report = verify_shelf(str(root))
    assert any("items.parquet" in p and records[2].scan_id in p for p in report.problems), report.problems


def test_update_writes_only_new_items(shelf) -> None:
    root, records, grids = shelf
    old_item = root / item_path(ScanId.parse(records[0].scan_id))
    before = old_item.stat().st_mtime_ns
    new = make_scan(root, "south", T0 + timedelta(days=30), seed=9)
    result = update_catalog(str(root), [new], removed_ids=[records[1].scan_id], grids=grids)
    assert item_path(ScanId.parse(new.scan_id)) in result.written
    assert not [p for p in result.written if p.startswith("scans/items/") and new.scan_id not in p]
    assert result.removed == [item_path(ScanId.parse(records[1].scan_id))]
    assert old_item.stat().st_mtime_ns == before
    assert result.written[-1] == "catalog.json"
    coll = json.loads((root / "scans/collection.json").read_text())
    assert coll["extent"]["temporal"]["interval"][0][1].startswith("2026-10-01")
    assert coll["license"] == "CC-BY-4.0"  # settings kept from the first build
    assert len([l for l in coll["links"] if l["rel"] == "item"]) == 3
    report = verify_shelf(str(root))
    assert report.ok, report.summary()


def test_placeholders_when_site_file_says_nothing(tmp_path: Path) -> None:
    root = tmp_path / "s"
    build_catalog(str(root), [make_scan(root, "north", T0)], [], {})
    coll = json.loads((root / "scans/collection.json").read_text())
    assert coll["license"] == "other" and "License not set" in coll["description"]
    assert "Provider not set" in coll["providers"][0]["name"]
    assert verify_shelf(str(root)).ok


def test_collections_cover_items_and_summarise(shelf) -> None:
    root, records, _ = shelf
    docs = _docs(root)
    coll = docs["scans/collection.json"]
    (w, s, e, n), = coll["extent"]["spatial"]["bbox"]
    for doc in docs.values():
        if doc["type"] == "Feature":
            b = doc["bbox"]
            assert w <= b[0] and s <= b[1] and b[2] <= e and b[3] <= n
            start, end = coll["extent"]["temporal"]["interval"][0]
            assert start <= doc["properties"]["start_datetime"] and doc["properties"]["end_datetime"] <= end
    assert coll["summaries"]["scanshelf:station"] == ["north", "south"]
    assert coll["summaries"]["pc:count"] == {"minimum": 2000, "maximum": 2000}
    assert coll["providers"][0]["name"] == "Test Lab"
    grids = docs["grids/collection.json"]
    cube = grids["assets"]["north"]
    assert cube["type"] == "application/vnd.zarr; version=3"
    assert cube["cube:dimensions"]["x"]["extent"] == [X0, X0 + 100.0]
    assert cube["cube:dimensions"]["time"]["extent"] == ["2026-09-01T06:00:00Z", "2026-09-08T06:00:00Z"]
    assert cube["cube:variables"]["elevation"]["unit"] == "m"


def test_cli_rebuilds_from_ledger_and_verify_exits_nonzero(shelf, tmp_path: Path) -> None:
    import sqlite3

    from click.testing import CliRunner

    from archive.cli.catalog import catalog_command, verify_command

    root, records, _ = shelf
    for p in (root / "scans").rglob("*"):
        if p.is_file():
            p.unlink()
    (root / "catalog.json").unlink()
    db = sqlite3.connect(root / "ledger.sqlite")
    db.execute("CREATE TABLE scans (scan_id TEXT PRIMARY KEY, station TEXT, status TEXT, record TEXT)")
    db.executemany("INSERT INTO scans VALUES (?, ?, 'done', ?)", [(r.scan_id, r.station, r.to_json()) for r in records])
    db.commit()
    db.close()
    site_file = tmp_path / "site.toml"
    site_file.write_text('[catalog]\nlicense = "CC0-1.0"\ntitle = "Rebuilt"\n')
    runner = CliRunner()
    out = runner.invoke(catalog_command, [str(root), "--site", str(site_file)])
    assert out.exit_code == 0, out.output
    assert "3 scans and 1 grid cubes" in out.output
    assert json.loads((root / "scans/collection.json").read_text())["license"] == "CC0-1.0"
    out = runner.invoke(verify_command, [str(root)])
    assert out.exit_code == 0 and "all good" in out.output, out.output
    target = root / records[0].preview_href
    target.write_bytes(target.read_bytes()[:-1] + b"\x00")
    out = runner.invoke(verify_command, [str(root)])
    assert out.exit_code == 1 and records[0].preview_href in out.output, out.output


def test_build_and_verify_through_fsspec_memory(shelf) -> None:
    # Same code path as object storage: no local renames, whole-object writes.
    import fsspec

    root, records, grids = shelf
    fs = fsspec.filesystem("memory")
    if fs.exists("/mem-shelf"):
        fs.rm("/mem-shelf", recursive=True)
    for p in root.rglob("*"):
        if p.is_file() and p.suffix != ".json" and p.name != "items.parquet":
            fs.pipe_file(f"/mem-shelf/{p.relative_to(root).as_posix()}", p.read_bytes())
    result = build_catalog("memory://mem-shelf", records, grids, SETTINGS)
    assert result.item_count == 3 and fs.exists("/mem-shelf/catalog.json")
    report = verify_shelf("memory://mem-shelf")
    assert report.ok, report.summary()
    fs.rm("/mem-shelf", recursive=True)


def test_unlinked_item_file_is_reported(shelf) -> None:
    root, _, _ = shelf
    stray = root / "scans/items/west/west-20260101T000000Z.json"
    stray.parent.mkdir(parents=True)
    stray.write_text("{}")
    report = verify_shelf(str(root), quick=True)
    assert report.problems == ["scans/items/west/west-20260101T000000Z.json: Item file not linked from scans/collection.json"]


def test_search_index_by_area_time_and_station(shelf) -> None:
    from archive.catalog.index import search_index
    from archive.catalog.store import ShelfFiles

    root, records, _ = shelf
    s = ShelfFiles(str(root))
    everywhere = (-180.0, -90.0, 180.0, 90.0)
    assert sorted(search_index(s, everywhere)) == sorted(r.scan_id for r in records)
    week2 = search_index(s, everywhere, T0 + timedelta(days=3), T0 + timedelta(days=10))
    assert week2 == [records[1].scan_id]
    assert search_index(s, station="south") == [records[2].scan_id]
    assert search_index(s, (0.0, 0.0, 1.0, 1.0)) == []  # far from the site


def test_hrefs_leaving_the_shelf_are_refused(shelf) -> None:
    # A catalog read from elsewhere is untrusted: nothing outside the shelf root is followed.
    root, records, _ = shelf
    path = root / item_path(ScanId.parse(records[0].scan_id))
    doc = json.loads(path.read_text())
    doc["assets"]["points"]["href"] = "../../../../outside.parquet"
    doc["assets"]["thumbnail"]["href"] = "https://elsewhere.example/x.png"
    path.write_text(json.dumps(doc))
    problems = verify_shelf(str(root), quick=True).problems
    assert any("escapes the shelf root" in p for p in problems), problems
    assert any("is not relative to the shelf" in p for p in problems), problems


@pytest.mark.parametrize("time_units", [None, "seconds since 1970-01-01", "minutes since 2000-01-01 00:00:00",
                                        "hours since 2026-03-01T06:00:00"])
def test_grids_are_described_as_xarray_sees_them(tmp_path, time_units):
    """discover_grids reads the stores through zarr alone; xarray.open_zarr is the reference."""
    import xarray as xr

    from archive.catalog.grids import discover_grids
    from archive.catalog.store import ShelfFiles

    rng = np.random.default_rng(5)
    x, y = 500000.5 + np.arange(30.0), 7650019.5 - np.arange(20.0)
    wkt = CRS.from_user_input("EPSG:32633").to_wkt()
    data = {"vy": (("y", "x"), rng.random((20, 30)), {"units": "m/d", "long_name": "northward"}),
            "vx": (("y", "x"), rng.random((20, 30)), {"units": "m/d"})}
    coords = {"x": x, "y": y, "spatial_ref": ((), 0, {"crs_wkt": wkt})}
    encoding = {}
    if time_units:
        data = {k: (("time", *dims), np.stack([v, v + 1]), attrs) for k, (dims, v, attrs) in data.items()}
        coords["time"] = np.array(["2026-03-01T06:00:00", "2026-02-01T18:30:00"], "datetime64[ns]")  # not sorted
        coords["source"] = ("time", np.array(["a.tif", "b.tif"], dtype=object))
        encoding["time"] = {"units": time_units, "dtype": "float64" if time_units.startswith("hours") else "int64"}
    xr.Dataset(data, coords).to_zarr(str(tmp_path / "grids" / "north-displacement.zarr"), zarr_format=3,
                                     consolidated=True, encoding=encoding)
    [got] = discover_grids(ShelfFiles(str(tmp_path)))
    # reference: xarray.open_zarr (its CF decoding, coordinate rules and variable order)
    ds = xr.open_zarr(str(tmp_path / "grids" / "north-displacement.zarr"), zarr_format=3)
    assert list(got.dims.items()) == list(ds.sizes.items())
    assert list(got.variables) == [v for v in ds.data_vars if v != "spatial_ref"] == ["vx", "vy"]  # store order
    assert got.variables["vy"] == {"dimensions": list(ds["vy"].dims), "unit": "m/d", "description": "northward"}
    if time_units:
        assert got.start == datetime(2026, 2, 1, 18, 30, tzinfo=timezone.utc) == utc_of(ds["time"].values.min())
        assert got.end == datetime(2026, 3, 1, 6, tzinfo=timezone.utc) == utc_of(ds["time"].values.max())
    else:
        assert got.start is None and got.end is None
    assert got.bbox == (500000.0, 7650000.0, 500030.0, 7650020.0) and got.cell == 1.0 and got.crs_code == "EPSG:32633"


def utc_of(t: np.datetime64) -> datetime:
    return datetime.fromisoformat(str(t.astype("datetime64[us]"))).replace(tzinfo=timezone.utc)
