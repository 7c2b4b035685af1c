"""Small windows over scans written by our writer fetch about what they hold, seen by the servers.

The bytes come from nginx's own access log and the requests from the S3 endpoint's own request
log (moto's werkzeug server); the points are compared with a brute-force DuckDB filter.
"""

from __future__ import annotations

import hashlib
import json
import logging
from datetime import UTC, datetime, timedelta
from decimal import ROUND_CEILING, ROUND_FLOOR, Decimal
from pathlib import Path

import duckdb
import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from archive import layout
from archive.points.coords import AxisEncoding
from archive.points.hilbert import SiteGrid
from archive.points.write import row_group_rows, write_scan
from archive.publish import publish
from archive.query import open_shelf
from tests.servers import CRS_CODE, _bbox_wgs84, _write_index, nginx, s3_endpoint  # noqa: F401 (fixtures)

CENTRE = (512_100.0, 5_420_100.0)
RADIUS = 80.0
N = 1_500_000  # points per scan: the small monitoring scan
T0 = datetime(2026, 4, 1, 6, 0, tzinfo=UTC)
# ~2 % of the scan's 160 m × 160 m bbox, off the station; edges at half-millimetres
BOX = (CENTRE[0] - 44.0005, CENTRE[1] + 12.0005, CENTRE[0] - 21.3735, CENTRE[1] + 34.6275)


def chunks(n: int, seed: int, chunk: int = 200_000):
    """Scan order: vertical lines sweeping in azimuth, points evenly over a disc, 1 mm integers."""
    enc = {a: AxisEncoding.for_las(0.001, o) for a, o in zip("xyz", (512_000.0, 5_420_000.0, 0.0))}
    for start in range(0, n, chunk):
        rng = np.random.default_rng((seed, start))
        i = np.arange(start, min(n, start + chunk))
        az = 2 * np.pi * (i // 500) / (n // 500)
        r = 3 + (RADIUS - 3) * np.sqrt((i % 500) / 500) + rng.normal(0, 0.01, i.size)
        xyz = (CENTRE[0] + r * np.cos(az), CENTRE[1] + r * np.sin(az), 400 + 0.05 * r + rng.normal(0, 0.01, i.size))
        cols = {a: enc[a].from_las(np.rint((v - enc[a].offset) / 0.001).astype(np.int64)) for a, v in zip("xyz", xyz)}
        yield pa.table({**cols, "intensity": pa.array(rng.integers(0, 65535, i.size).astype(np.uint16)),
                        "classification": pa.array(rng.integers(1, 3, i.size).astype(np.uint8)),
                        "gps_time": pa.array(1.4e9 + seed * 1e5 + i * 2e-6)})


@pytest.fixture(scope="module")
def written(tmp_path_factory) -> tuple[Path, list[Path]]:
    """A shelf of two scans of one station written by write_scan with its own row-group choice."""
    import shapely

    root = tmp_path_factory.mktemp("remote-shelf")
    grid = SiteGrid.from_bounds(511_000.0, 5_419_000.0, 514_000.0, 5_422_000.0)
    rows, paths = [], []
    for k in range(2):
        when = T0 + timedelta(days=k)
        sid = layout.ScanId("north", when)
        path = root / layout.points_path(sid)
        path.parent.mkdir(parents=True, exist_ok=True)
        box = (CENTRE[0] - RADIUS, CENTRE[1] - RADIUS, CENTRE[0] + RADIUS, CENTRE[1] + RADIUS)
        w = write_scan(chunks(N, k), str(path), grid, metadata={}, row_group_size=row_group_rows(N, box))
        data = path.read_bytes()
        wbox = _bbox_wgs84(w.bbox[0], w.bbox[1], w.bbox[3], w.bbox[4])
        rows.append({
            "id": str(sid), "collection": "scans", "datetime": when, "start_datetime": when,
            "end_datetime": when + timedelta(minutes=10), "geometry": shapely.to_wkb(shapely.box(*wbox)),
            "bbox": dict(zip(("xmin", "ymin", "xmax", "ymax"), wbox)), "scanshelf:station": "north",
            "proj:code": CRS_CODE, "proj:bbox": list(w.bbox), "pc:count": N, "scanshelf:partial": False,
            "assets": {"points": {"href": layout.points_path(sid), "type": "application/vnd.apache.parquet",
                                  "file:size": len(data), "file:checksum": "1220" + hashlib.sha256(data).hexdigest()}},
            "item_json": json.dumps({"type": "Feature", "id": str(sid), "properties": {}}),
        })
        paths.append(path)
    _write_index(root, rows)
    (root / layout.CATALOG).write_text(json.dumps({"type": "Catalog", "id": "t", "stac_version": "1.1.0",
                                                   "description": "t", "links": []}))
    return root, paths


def brute_force(paths: list[Path]) -> list[tuple]:
    # reference: DuckDB's own Parquet reader and SQL filter over the whole files
    return duckdb.execute(
        "SELECT x::VARCHAR, y::VARCHAR, z::VARCHAR FROM read_parquet(?) WHERE x BETWEEN ? AND ? AND y BETWEEN ? AND ? "
        "ORDER BY 1, 2, 3", [[str(p) for p in paths], BOX[0], BOX[2], BOX[1], BOX[3]]).fetchall()


def ideal_and_groups(path: Path, inside: int) -> tuple[float, int]:
    """x, y, z bytes × share of rows inside, and the row groups whose min/max meet the window.

    # reference: pyarrow's reading of the Parquet footer (row-group statistics and sizes)
    """
    md = pq.ParquetFile(path).metadata
    names = {md.schema.column(j).path: j for j in range(md.num_columns)}
    xyz = groups = 0
    for i in range(md.num_row_groups):
        rg = md.row_group(i)
        xyz += sum(rg.column(names[a]).total_compressed_size for a in "xyz")
        sx, sy = rg.column(names["x"]).statistics, rg.column(names["y"]).statistics
        groups += not (float(sx.max) < BOX[0] or float(sx.min) > BOX[2] or float(sy.max) < BOX[1] or float(sy.min) > BOX[3])
    return xyz * inside / md.num_rows, groups


def test_row_groups_are_small_and_statistics_only_where_they_prune(written):
    _, paths = written
    md = pq.ParquetFile(paths[0]).metadata
    assert md.num_row_groups >= 50  # a 2 % window must be able to skip most of the file
    names = [md.schema.column(j).path for j in range(md.num_columns)]
    with_stats = {n for j, n in enumerate(names) if md.row_group(0).column(j).is_stats_set}
    assert with_stats == {"x", "y", "z", "gps_time"}


def test_window_bytes_from_nginx_log(nginx, written):
    root, paths = written
    publish(str(root), str(nginx.root / "remote13"))
    shelf = open_shelf(f"{nginx.url}/remote13")
    found = shelf.find(bbox=BOX, start=T0 - timedelta(hours=1), end=T0 + timedelta(days=2))
    assert len(found) == 2
    mark, before = nginx.mark(), shelf.io.snapshot()
    table = found.read_points(columns=["x", "y", "z"], exact=True)
    counted = shelf.io.snapshot() - before
    # points files only: the catalog's items.parquet, read before the mark, may be logged after it
    hits = [h for h in nginx.hits(mark, at_least=counted.requests, uri_has="/points/") if h[1].endswith(".parquet")]
    sent = sum(h[3] for h in hits)
    want = brute_force(paths)
    got = sorted(zip(*(table[c].cast(pa.string()).to_pylist() for c in "xyz")))
    assert got == want and len(want) > 0.01 * 2 * N
    ideal = groups = 0
    for path in paths:
        inside = len(brute_force([path]))
        i, g = ideal_and_groups(path, inside)
        ideal, groups = ideal + i, groups + g
    assert [h for h in hits if h[2] != 206] == []  # range requests only
    assert len(hits) <= 3 * len(paths) + groups  # footer (1-2) + one per contiguous run of groups
    assert sent <= 4 * ideal, (sent, ideal)
    assert sent < 0.1 * sum(p.stat().st_size for p in paths)
    assert (counted.requests, counted.bytes) == (len(hits), sent)  # Shelf.io agrees with the server


class _Requests(logging.Handler):
    def __init__(self):
        super().__init__()
        self.lines: list[str] = []

    def emit(self, record):
        self.lines.append(record.getMessage())


def test_window_requests_seen_by_s3_endpoint(s3_endpoint, written):
    root, paths = written
    dest = f"s3://{s3_endpoint.bucket}/remote13"
    publish(str(root), dest, s3_endpoint.options)
    shelf = open_shelf(dest, s3_endpoint.options)
    found = shelf.find(bbox=BOX)
    seen = _Requests()
    server_log = logging.getLogger("werkzeug")  # moto's server logs every request it answers here
    old_level = server_log.level
    server_log.setLevel(logging.INFO)
    server_log.addHandler(seen)
    try:
        before = shelf.io.snapshot()
        table = found.read_points(columns=["x", "y", "z"], exact=True)
        counted = shelf.io.snapshot() - before
    finally:
        server_log.removeHandler(seen)
        server_log.setLevel(old_level)
    gets = [line for line in seen.lines if "GET /" in line and ".parquet " in line]  # lines may carry colour codes
    groups = sum(ideal_and_groups(p, 0)[1] for p in paths)
    assert sorted(zip(*(table[c].cast(pa.string()).to_pylist() for c in "xyz"))) == brute_force(paths)
    assert 0 < len(gets) <= 3 * len(paths) + groups
    assert counted.requests == len(gets)  # Shelf.io agrees with the endpoint


def test_duckdb_and_pyarrow_dataset_read_the_files_and_prune(written):
    import pyarrow.dataset as pads

    _, paths = written
    # reference: pyarrow.dataset with a filter pushes down to row-group statistics
    dataset = pads.dataset([str(p) for p in paths], format="parquet")
    x, y = pads.field("x"), pads.field("y")
    # pyarrow.dataset prunes row groups only with literals of the column's own type (DECIMAL(18, 3)
    # here; a float or another scale reads every group): the half-millimetre edges round inwards
    mm = Decimal("0.001")
    lo_x, lo_y = (pa.scalar(Decimal(f"{v:.4f}").quantize(mm, ROUND_CEILING), pa.decimal128(18, 3)) for v in BOX[:2])
    hi_x, hi_y = (pa.scalar(Decimal(f"{v:.4f}").quantize(mm, ROUND_FLOOR), pa.decimal128(18, 3)) for v in BOX[2:])
    flt = (x >= lo_x) & (x <= hi_x) & (y >= lo_y) & (y <= hi_y)
    table = dataset.to_table(columns=["x", "y", "z"], filter=flt)
    assert sorted(zip(*(table[c].cast(pa.string()).to_pylist() for c in "xyz"))) == brute_force(paths)
    fragments = list(dataset.get_fragments(filter=flt))
    kept = sum(len(f.split_by_row_group(filter=flt)) for f in fragments)
    total = sum(pq.ParquetFile(p).metadata.num_row_groups for p in paths)
    assert kept < 0.25 * total  # the statistics prune for a generic reader too
