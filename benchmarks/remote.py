"""Remote subsetting against nginx on loopback: bytes and requests against the ideal.

Builds a demo shelf (make_demo → migrate), publishes it to a folder nginx serves on
127.0.0.1, then for centred windows of 0.1 %, 1 % and 10 % of each scan's area reads the
points over HTTP and prints, from nginx's own access log:
  * bytes fetched and requests, per scan touched;
  * the ideal: each file's bytes for the asked columns × the fraction of its rows inside;
  * downloading the whole files instead;
and the cold-open latency (open + find + first points).

Usage:
  python benchmarks/remote.py                          # 4 scans of 1M points
  python benchmarks/remote.py --points-per-scan 4000000 --scans 8 --columns x,y,z,intensity
Targets (issue): bytes ≤ 2× ideal at 1 % and 10 %; ≥ 50× fewer bytes than whole files at 1 %;
≤ 3 requests per scan touched plus a fixed few for open and find.
"""

from __future__ import annotations

import argparse
import os
import sys
import tempfile
import time
from pathlib import Path

import pyarrow.parquet as pq

sys.path.insert(0, os.path.join(os.path.dirname(__file__), ".."))

from archive.demo import make_demo
from archive.migrate import migrate
from archive.publish import publish
from archive.query import open_shelf
from archive.query.shelf import Scans
from tests.servers import nginx_binary, serve_with_nginx


def window(bbox, fraction: float):
    n = len(bbox) // 2
    xmin, ymin, xmax, ymax = bbox[0], bbox[1], bbox[n], bbox[n + 1]
    half = fraction**0.5 / 2
    cx, cy, w, h = (xmin + xmax) / 2, (ymin + ymax) / 2, xmax - xmin, ymax - ymin
    return (cx - half * w, cy - half * h, cx + half * w, cy + half * h)


def column_bytes(path: Path, columns: list[str]) -> tuple[int, int]:
    """(compressed bytes of these columns, rows) from the file's own footer."""
    md = pq.ParquetFile(path).metadata
    names = {md.schema.column(j).path: j for j in range(md.num_columns)}
    total = sum(md.row_group(i).column(names[c]).total_compressed_size
                for i in range(md.num_row_groups) for c in columns)
    return total, md.num_rows


def build(work: Path, points_per_scan: int, row_group_points: int | None) -> None:
    t = time.perf_counter()
    make_demo(work / "demo", points_per_scan=points_per_scan, weeks=1, faults=False, overwrite=True)
    t1 = time.perf_counter()
    extra = {"row_group_points": row_group_points} if row_group_points else {}
    migrate(str(work / "demo/source"), str(work / "shelf"), site_file=str(work / "demo/site.toml"),
            previews=False, **extra)
    print(f"demo source {t1 - t:.0f} s, migrate {time.perf_counter() - t1:.0f} s: {work / 'shelf'}")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--points-per-scan", type=int, default=1_000_000)
    ap.add_argument("--scans", type=int, default=4, help="scans to read per window")
    ap.add_argument("--columns", default="x,y,z")
    ap.add_argument("--row-group-points", type=int, default=None, help="migrate's row-group size (default: its own)")
    ap.add_argument("--workdir", default=None, help="reuse the shelf built there before")
    args = ap.parse_args()
    columns = args.columns.split(",")
    binary = nginx_binary()
    if binary is None:
        sys.exit("nginx not found: run .ci/install-servers")
    work = Path(args.workdir or tempfile.mkdtemp(prefix="scanshelf-remote-"))
    if (work / "shelf" / "catalog.json").exists():
        print(f"reusing the shelf in {work / 'shelf'}")
    else:
        build(work, args.points_per_scan, args.row_group_points)
    (work / "nginx").mkdir(exist_ok=True)
    with serve_with_nginx(work / "nginx", binary) as server:
        publish(str(work / "shelf"), str(server.root / "shelf"))
        url = f"{server.url}/shelf"

        mark = server.mark()
        t0 = time.perf_counter()
        shelf = open_shelf(url)
        scans = shelf.find()
        first = scans[0]
        shelf.find(bbox=window(first.bbox, 0.001)).read_points(columns=columns)
        cold = time.perf_counter() - t0
        hits = server.hits(mark)
        print(f"cold open + find + first points: {cold * 1000:.0f} ms, {len(hits)} requests "
              f"({sum(1 for h in hits if not h[1].endswith('.parquet') or 'items' in h[1])} for open and find)")

        chosen = sorted(scans, key=lambda s: -s.point_count)[: args.scans]
        print(f"\n{len(chosen)} scans, {sum(s.point_count for s in chosen):,} points, "
              f"{sum(s.size for s in chosen):,} bytes; columns {columns}")
        print(f"{'window':>7} {'points':>10} {'requests':>9} {'req/scan':>9} {'fetched':>12} {'ideal':>12} "
              f"{'× ideal':>8} {'whole files':>12} {'× fewer':>8}")
        for fraction in (0.001, 0.01, 0.1):
            fetched = requests = points = 0
            ideal = 0.0
            whole = 0
            for scan in chosen:
                box = window(scan.bbox, fraction)
                one = shelf.find(bbox=box, station=scan.station, start=scan.start, end=scan.end)
                one = [s for s in one if s.id == scan.id]
                mark = server.mark()
                table = Scans(shelf, one, box).read_points(columns=columns)
                hits = [h for h in server.hits(mark) if h[1].endswith(".parquet")]
                fetched += sum(h[3] for h in hits)
                requests += len(hits)
                points += table.num_rows
                col_bytes, rows = column_bytes(work / "shelf" / scan.href, columns)
                ideal += col_bytes * table.num_rows / rows
                whole += scan.size
            print(f"{fraction:>7.1%} {points:>10,} {requests:>9} {requests / len(chosen):>9.1f} {fetched:>12,} "
                  f"{ideal:>12,.0f} {fetched / max(ideal, 1):>8.2f} {whole:>12,} {whole / max(fetched, 1):>8.1f}")


if __name__ == "__main__":
    main()
