"""Growth benchmark: what adding one scan to a shelf of N scans costs, against a one-scan shelf.

Builds a source of small scans (tests/factory-style LAS 1.4, one station) and migrates it at
N/10 and at N scans; at each size it drops one more scan into the source and times the
incremental re-run. The same new scan migrated into an empty shelf is the reference: the ratio
says how much the size of the shelf adds to the cost of one scan, and the two sizes show
whether that grows with the shelf. Also counts the files each addition rewrote.

    python benchmarks/growth.py [--scans 1000] [--points 20000]
"""

from __future__ import annotations

import argparse
import shutil
import tempfile
import sys
import time
from datetime import timedelta
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from archive.migrate import migrate  # noqa: E402
from tests import factory  # noqa: E402


def _mtimes(shelf: Path) -> dict[Path, int]:
    return {p: p.stat().st_mtime_ns for p in shelf.rglob("*") if p.is_file()}


def _add_one(work: Path, index: int, when, points: int) -> tuple[float, list[str], int]:
    """Drop one more scan into the source and time the incremental migration."""
    factory.write_las(work / f"source/north/scan_new_{index}.las", points, when, seed=10**6 + index, extra=False)
    before = _mtimes(work / "shelf")
    t0 = time.perf_counter()
    result = migrate(str(work / "source"), str(work / "shelf"), previews=False)
    seconds = time.perf_counter() - t0
    assert len(result.converted) == 1, result.summary()
    after = _mtimes(work / "shelf")
    rewritten = sorted(str(p.relative_to(work / "shelf")) for p in after if before.get(p) != after[p])
    return seconds, rewritten, len(after)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--scans", type=int, default=1000)
    parser.add_argument("--points", type=int, default=20_000)
    parser.add_argument("--workdir", default=str(Path(tempfile.gettempdir()) / "scanshelf-bench-growth"),
                        help="emptied and reused (default: scanshelf-bench-growth in the system temp folder)")
    args = parser.parse_args()
    work = Path(args.workdir)
    shutil.rmtree(work, ignore_errors=True)
    start = factory.utc(2026, 1, 1)
    small = max(1, args.scans // 10)
    adds = []
    built = 0
    for size in (small, args.scans):
        for i in range(built, size):
            factory.write_las(work / f"source/north/scan_{i:05d}.las", args.points, start + timedelta(hours=6 * i),
                              seed=i, extra=False)
        t0 = time.perf_counter()
        migrate(str(work / "source"), str(work / "shelf"), previews=False)
        print(f"shelf grown to {size} scans × {args.points:,} points in {time.perf_counter() - t0:.1f} s", flush=True)
        built = size
        # the added scan is newer than any in the source, as on a living shelf
        adds.append((size, *_add_one(work, size, start + timedelta(hours=6 * (args.scans + len(adds))), args.points)))

    (work / "one/north").mkdir(parents=True)
    shutil.copy(work / f"source/north/scan_new_{args.scans}.las", work / "one/north/scan_new.las")
    t0 = time.perf_counter()
    migrate(str(work / "one"), str(work / "one-shelf"), previews=False)
    one = time.perf_counter() - t0

    print(f"the same scan into an empty shelf: {one:.2f} s")
    for size, seconds, rewritten, files in adds:
        print(f"adding one scan to a shelf of {size} scans: {seconds:.2f} s, ratio to the empty shelf "
              f"{seconds / one:.2f}; files rewritten {len(rewritten)} of {files}")
    print("files rewritten by the last addition:")
    for p in adds[-1][2]:
        print("   ", p)
    shutil.rmtree(work, ignore_errors=True)


if __name__ == "__main__":
    main()
