"""Benchmark of the catalog: build 10,000 synthetic scan Items and search them.

Prints the time to write the whole catalog (Item JSON, Collections, index, root), the size of
the search index, and the latency of one search by area and time two ways:
  * through scans/items.parquet (row groups skipped on their bbox/time statistics, then filtered);
  * by walking every Item JSON file (the way a reader without the index must do it);
and the ratio between them. Targets: index search under 50 ms warm, at least 50x faster.

Usage:
  python benchmarks/catalog.py                  # 10,000 Items in a temporary folder
  python benchmarks/catalog.py --items 2000 --keep ./bench-shelf
"""

from __future__ import annotations

import argparse
import json
import os
import statistics
import sys
import tempfile
import time
from datetime import datetime, timedelta, timezone
from pathlib import Path

from pyproj import CRS, Transformer
from shapely.geometry import box, mapping

sys.path.insert(0, os.path.join(os.path.dirname(__file__), ".."))

from archive.catalog import build_catalog  # noqa: E402
from archive.catalog.index import search_index as index_search  # noqa: E402
from archive.catalog.store import ShelfFiles  # noqa: E402
from archive.layout import ScanId, grid_path, points_path  # noqa: E402
from archive.records import ColumnInfo, ScanRecord  # noqa: E402

CRS_CODE = "EPSG:32633"
WKT = CRS.from_user_input(CRS_CODE).to_wkt()
TO_WGS84 = Transformer.from_crs(32633, 4326, always_xy=True)
SITE = (500_000.0, 7_650_000.0)  # fictional site
STATIONS = 40  # positions spread over 8 km x 5 km, each seeing a 300 m patch
T0 = datetime(2016, 1, 1, tzinfo=timezone.utc)


def records(n: int) -> list[ScanRecord]:
    """n scans spread over the stations and ten years, with plausible metadata."""
    out = []
    per_station = -(-n // STATIONS)
    for s in range(STATIONS):
        sx = SITE[0] + (s % 8) * 1000.0
        sy = SITE[1] + (s // 8) * 1000.0
        footprint = mapping(box(*TO_WGS84.transform_bounds(sx, sy, sx + 300, sy + 300)))
        for k in range(per_station):
            if len(out) == n:
                return out
            start = T0 + timedelta(hours=6 + 24 * (k * 3650 // per_station), minutes=s)
            scan = ScanId(f"st{s:02d}", start)
            out.append(
                ScanRecord(
                    scan_id=str(scan), station=scan.station, start=start,
                    end=start + timedelta(minutes=9), first_point_time=start + timedelta(seconds=1),
                    crs_wkt=WKT, crs_code=CRS_CODE,
                    bbox=(sx, sy, 180.0, sx + 300, sy + 300, 260.0),
                    point_count=20_000_000, points_href=points_path(scan), points_size=180_000_000,
                    points_sha256=f"{len(out):064x}", row_groups=80,
                    columns=(ColumnInfo("x", "decimal128(18, 3)", 8, sx, sx + 300),
                             ColumnInfo("y", "decimal128(18, 3)", 8, sy, sy + 300),
                             ColumnInfo("z", "decimal128(18, 3)", 8, 180.0, 260.0),
                             ColumnInfo("intensity", "uint16", 2, 0, 65535)),
                    source_path=f"{scan.station}/{start:%Y%m%d_%H%M%S}.laz",
                    source_sha256=f"{len(out) + 1:064x}", source_format="laz",
                    scanner_origin=(sx + 150, sy, 200.0), footprint=footprint,
                    grid_href=grid_path(scan.station),
                )
            )
    return out


def query_window() -> tuple[tuple[float, float, float, float], datetime, datetime]:
    """About one station's patch, one year: a typical 'what do we have here then' search."""
    x, y = SITE[0] + 2 * 1000.0, SITE[1] + 1000.0
    return TO_WGS84.transform_bounds(x + 100, y + 100, x + 200, y + 200), datetime(2020, 1, 1, tzinfo=timezone.utc), datetime(2021, 1, 1, tzinfo=timezone.utc)


def search_index(root: Path) -> list[str]:
    (w, s, e, n), t0, t1 = query_window()
    return sorted(index_search(ShelfFiles(str(root)), (w, s, e, n), t0, t1))


def search_json(root: Path) -> list[str]:
    (w, s, e, n), t0, t1 = query_window()
    hits = []
    for path in (root / "scans/items").glob("*/*.json"):
        item = json.loads(path.read_text())
        b, p = item["bbox"], item["properties"]
        start = datetime.fromisoformat(p["start_datetime"].replace("Z", "+00:00"))
        end = datetime.fromisoformat(p["end_datetime"].replace("Z", "+00:00"))
        if b[2] >= w and b[0] <= e and b[3] >= s and b[1] <= n and end >= t0 and start < t1:
            hits.append(item["id"])
    return sorted(hits)


def timed(fn, repeat: int) -> tuple[float, object]:
    times, result = [], None
    for _ in range(repeat):
        t = time.perf_counter()
        result = fn()
        times.append(time.perf_counter() - t)
    return statistics.median(times), result


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--items", type=int, default=10_000)
    ap.add_argument("--keep", help="write the shelf here instead of a temporary folder")
    args = ap.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        root = Path(args.keep or tmp)
        recs = records(args.items)
        t = time.perf_counter()
        build_catalog(str(root), recs, [], {"title": "Catalog benchmark", "license": "CC0-1.0"})
        build_s = time.perf_counter() - t
        index_mb = (root / "scans/items.parquet").stat().st_size / 1e6
        search_index(root)  # warm the page cache and imports
        idx_s, idx_hits = timed(lambda: search_index(root), 7)
        json_s, json_hits = timed(lambda: search_json(root), 3)
        assert idx_hits == json_hits, "index and JSON walk disagree"
        print(f"items                       {args.items}")
        print(f"build catalog               {build_s:8.2f} s  ({args.items / build_s:.0f} Items/s)")
        print(f"index size                  {index_mb:8.2f} MB")
        print(f"hits                        {len(idx_hits)}")
        print(f"search via index (warm)     {idx_s * 1e3:8.1f} ms")
        print(f"search by walking JSON      {json_s * 1e3:8.1f} ms")
        print(f"ratio                       {json_s / idx_s:8.1f} x")


if __name__ == "__main__":
    main()
