"""Remote subsetting against nginx on loopback: bytes and requests against the ideal, from nginx's log.

Writes scan-like points (benchmarks/scanlike.py) with the project's writer (row-group size from
``row_group_rows`` unless --row-group-points), publishes them as a shelf with an items index in
a folder nginx serves on 127.0.0.1, and prints, from nginx's own access log:

  five   a 2 % window (bbox + time) over five 1.5M-point scans of one station
  large  the same window share over one 30M-point scan
  many   a 1 % window over 1,000 small scans (20 stations × 50 epochs) of which 50 intersect:
         open + find + read time on loopback

Per case: points, requests on the points files (and per scan), bytes sent, the ideal (each file's
x, y, z bytes × the share of its rows inside the window), ×ideal, footer size, file size against
LAZ of the same points (lazrs), write speed. Results are checked against a DuckDB filter of the
local files. Targets (issue): five ≤ 4× ideal and ≤ 3 requests per scan plus one per range;
large ≤ 2× ideal; many < 5 s; files ≤ 1.1× LAZ.

Usage:
  python benchmarks/remote.py                        # all three cases (~5 min on 2 cores)
  python benchmarks/remote.py --cases five --row-group-points 262144
"""

from __future__ import annotations

import argparse
import hashlib
import json
import os
import resource
import sys
import tempfile
import time
from datetime import UTC, datetime, timedelta
from pathlib import Path

import duckdb
import pyarrow.parquet as pq

sys.path.insert(0, os.path.join(os.path.dirname(__file__), ".."))
sys.path.insert(0, os.path.dirname(__file__))

import scanlike  # noqa: E402

from archive import layout  # noqa: E402
from archive.points.hilbert import SiteGrid  # noqa: E402
from archive.points.write import row_group_rows, write_scan  # noqa: E402
from archive.query import open_shelf  # noqa: E402
from tests.servers import CRS_CODE, _bbox_wgs84, _write_index, nginx_binary, serve_with_nginx  # noqa: E402

COLUMNS = ["x", "y", "z"]
RADIUS = 80.0
T0 = datetime(2026, 3, 1, 6, 0, tzinfo=UTC)


def cpu() -> float:
    r = resource.getrusage(resource.RUSAGE_SELF)
    return r.ru_utime + r.ru_stime


def write_shelf(root: Path, scans: list[tuple[str, datetime, int, tuple[float, float]]], rows: int | None) -> dict:
    """Points files + items index + root catalog; returns write figures."""
    import shapely

    grid = SiteGrid.from_bounds(400_000.0, 5_300_000.0, 410_000.0, 5_310_000.0)
    index, points, wall, proc = [], 0, 0.0, 0.0
    for seed, (station, when, n, centre) in enumerate(scans):
        sid = layout.ScanId(station, when)
        href = layout.points_path(sid)
        path = root / href
        path.parent.mkdir(parents=True, exist_ok=True)
        box = (centre[0] - RADIUS, centre[1] - RADIUS, centre[0] + RADIUS, centre[1] + RADIUS)
        axes = {a: e.to_dict() for a, e in scanlike.axes(centre).items()}
        meta = {"scanshelf": {"scan_id": str(sid), "station": station, "axes": axes}}
        t, c = time.perf_counter(), cpu()
        written = write_scan((tb for tb, _ in scanlike.chunks(n, centre, RADIUS, seed)), str(path), grid,
                             metadata=meta, row_group_size=rows or row_group_rows(n, box))
        wall += time.perf_counter() - t
        proc += cpu() - c
        points += n
        data = path.read_bytes()
        pbox = list(written.bbox)
        wbox = _bbox_wgs84(pbox[0], pbox[1], pbox[3], pbox[4])
        end = when + timedelta(seconds=600)
        index.append({
            "id": str(sid), "collection": "scans", "datetime": when, "start_datetime": when, "end_datetime": end,
            "geometry": shapely.to_wkb(shapely.box(*wbox)), "bbox": dict(zip(("xmin", "ymin", "xmax", "ymax"), wbox)),
            "scanshelf:station": station, "proj:code": CRS_CODE, "proj:bbox": pbox, "pc:count": n,
            "scanshelf:partial": False,
            "assets": {"points": {"href": href, "type": "application/vnd.apache.parquet", "file:size": len(data),
                                  "file:checksum": "1220" + hashlib.sha256(data).hexdigest()}},
            "item_json": json.dumps({"type": "Feature", "id": str(sid), "properties": {}}),
        })
    _write_index(root, index)
    (root / layout.CATALOG).write_text(json.dumps({"type": "Catalog", "stac_version": "1.1.0", "id": "bench",
                                                   "description": "remote benchmark", "links": []}))
    return {"points": points, "wall": wall, "cpu": proc}


def central(fraction: float, centre: tuple[float, float]) -> tuple[float, float, float, float]:
    """A square window of ``fraction`` of a scan's bbox area, off the station (where density peaks)."""
    side = 2 * RADIUS * fraction**0.5
    x0, y0 = centre[0] - 0.55 * RADIUS, centre[1] + 0.15 * RADIUS
    return (x0, y0, x0 + side, y0 + side)


def xyz_bytes(path: Path) -> tuple[int, int, int]:
    """(x, y, z compressed bytes, rows, footer bytes) from the file's own footer."""
    md = pq.ParquetFile(path).metadata
    names = {md.schema.column(j).path: j for j in range(md.num_columns)}
    total = sum(md.row_group(i).column(names[c]).total_compressed_size for i in range(md.num_row_groups) for c in COLUMNS)
    return total, md.num_rows, md.serialized_size


def read_case(name: str, server, root: Path, box, start, end, expect_scans: int) -> None:
    url = f"{server.url}/{root.name}"
    mark = server.mark()
    t, c = time.perf_counter(), cpu()
    shelf = open_shelf(url)
    found = shelf.find(bbox=box, start=start, end=end)
    table = found.read_points(columns=COLUMNS)
    wall, proc = time.perf_counter() - t, cpu() - c
    hits = server.hits(mark)
    pts = [h for h in hits if h[1].startswith(f"/{root.name}/points/")]
    fetched = sum(h[3] for h in pts)
    ideal = whole = footer = 0.0
    con = duckdb.connect()
    expected = 0
    for scan in found:
        path = root / scan.href
        col, rows, foot = xyz_bytes(path)
        inside = con.execute(  # reference: DuckDB's own Parquet reader, brute-force filter
            f"select count(*) from read_parquet('{path}') where x::double between {box[0]} and {box[2]} "
            f"and y::double between {box[1]} and {box[3]}").fetchone()[0]
        expected += inside
        ideal += col * inside / rows
        whole += scan.size
        footer += foot
    assert len(found) == expect_scans, (len(found), expect_scans)
    assert table.num_rows == expected, (table.num_rows, expected)
    print(f"[{name}] {len(found)} scans, {table.num_rows:,} points (= DuckDB filter) in {wall:.2f} s wall, {proc:.2f} s CPU")
    print(f"  requests: {len(hits)} total, {len(pts)} on points files = {len(pts) / max(1, len(found)):.1f} per scan "
          f"({shelf.io.requests} counted by shelf.io)")
    print(f"  bytes: {fetched:,} sent for points; ideal {ideal:,.0f} -> {fetched / max(ideal, 1):.2f}x ideal; "
          f"{fetched / whole:.2%} of the whole files ({whole:,.0f}); footers {footer / max(1, len(found)):,.0f} B per scan")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--cases", default="five,large,many")
    ap.add_argument("--row-group-points", type=int, default=None, help="fixed row-group size (default: row_group_rows)")
    ap.add_argument("--large-points", type=int, default=30_000_000)
    ap.add_argument("--no-laz", action="store_true", help="skip writing LAZ for the size comparison")
    ap.add_argument("--workdir", default=None)
    args = ap.parse_args()
    binary = nginx_binary()
    if binary is None:
        sys.exit("nginx not found: apt-get install nginx-light")
    work = Path(args.workdir or tempfile.mkdtemp(prefix="scanshelf-remote-"))
    work.mkdir(parents=True, exist_ok=True)
    cases = args.cases.split(",")
    print(f"work folder {work}; machine shared with other jobs: wall times are noisy, CPU seconds beside them")
    with serve_with_nginx(work, binary) as server:
        www = server.root
        if "five" in cases or "large" in cases:
            for name, n, count in (("five", 1_500_000, 5), ("large", args.large_points, 1)):
                if name not in cases:
                    continue
                centre = (405_000.0, 5_305_000.0)
                scans = [("north", T0 + timedelta(days=i), n, centre) for i in range(count)]
                scans.append(("north", T0 + timedelta(days=60), n // 10, centre))  # outside the time window
                w = write_shelf(www / name, scans, args.row_group_points)
                first = www / name / layout.points_path(layout.ScanId("north", T0))
                md = pq.ParquetFile(first).metadata
                line = (f"[{name}] wrote {w['points']:,} points at {w['points'] / w['wall'] / 1e6:.2f} M pts/s wall "
                        f"({w['points'] / w['cpu'] / 1e6:.2f} per CPU s); {md.num_row_groups} row groups of "
                        f"{md.row_group(0).num_rows:,} rows, footer {md.serialized_size:,} B, file {first.stat().st_size:,} B")
                if not args.no_laz:
                    laz = scanlike.write_laz(str(work / f"{name}.laz"), n, centre, RADIUS, 0)
                    line += f" = {first.stat().st_size / laz:.3f}x LAZ ({laz:,} B)"
                print(line, flush=True)
                read_case(name, server, www / name, central(0.02, centre), T0 - timedelta(hours=1),
                          T0 + timedelta(days=count), count)
        if "many" in cases:
            centres = [(401_000.0 + 500 * (k % 5), 5_301_000.0 + 500 * (k // 5)) for k in range(20)]
            scans = [(f"s{k:02d}", T0 + timedelta(days=e), 20_000, c) for k, c in enumerate(centres) for e in range(50)]
            w = write_shelf(www / "many", scans, args.row_group_points)
            print(f"[many] wrote 1,000 scans ({w['points']:,} points) in {w['wall']:.0f} s", flush=True)
            read_case("many", server, www / "many", central(0.01, centres[7]), None, None, 50)


if __name__ == "__main__":
    main()
