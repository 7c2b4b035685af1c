"""Survey inspection cost of one point file: the deep read (count, bounds, time range) and the
SHA-256 taken from the same reads, as ``archive.survey.inspect_file`` does it in a survey.

Prints CPU seconds (time.process_time) and wall seconds of each run, the best of --repeat runs,
and points per CPU-second; the first run also pays the one-time imports (laspy, pyproj: ~0.25 s). The floor is a plain SHA-256 of the file's bytes (--floor prints it).

    python benchmarks/survey_inspect.py /path/to/station/scan.las [--repeat 3] [--floor]
"""

from __future__ import annotations

import argparse
import hashlib
import os
import time

import fsspec

from archive.sitefile import SiteFile
from archive.survey import inspect_file


def _timed(fn) -> tuple[float, float, object]:
    c0, w0 = time.process_time(), time.perf_counter()
    result = fn()
    return time.process_time() - c0, time.perf_counter() - w0, result


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("path")
    parser.add_argument("--repeat", type=int, default=3)
    parser.add_argument("--floor", action="store_true", help="also time a plain sha256 of the file")
    args = parser.parse_args()
    fs = fsspec.filesystem("file")
    path = os.path.abspath(args.path)
    relpath = "/".join(path.split("/")[-2:])
    size = os.path.getsize(path)
    site = SiteFile(crs="EPSG:32633")
    runs = []
    for i in range(args.repeat):
        cpu, wall, report = _timed(lambda: inspect_file(fs, path, relpath, size, site))
        runs.append((cpu, wall))
        first = " (with first imports)" if i == 0 else ""
        print(f"inspect_file: {cpu:.3f} CPU-s  {wall:.3f} s wall  ({report.point_count:,} points, {report.status}){first}")
    best = min(runs)
    print(f"best of {args.repeat}: {best[0]:.3f} CPU-s, {best[1]:.3f} s wall; "
          f"{report.point_count / best[0] / 1e6:.1f}M points per CPU-second")
    if args.floor:
        def plain() -> str:
            digest = hashlib.sha256()
            with open(path, "rb") as fh:
                while block := fh.read(8 << 20):
                    digest.update(block)
            return digest.hexdigest()
        floor = min(_timed(plain)[:2] for _ in range(args.repeat))
        print(f"floor, plain sha256 of the file: {floor[0]:.3f} CPU-s, {floor[1]:.3f} s wall")


if __name__ == "__main__":
    main()
