"""Growth benchmark: what adding one scan to a shelf of N scans costs, against a one-scan shelf.

Builds a source of N small scans (tests/factory-style LAS 1.4, one station), migrates it, then
drops one more scan into the source and times the incremental re-run. The same new scan
migrated into an empty shelf is the reference: the ratio says how much the size of the
shelf adds to the cost of one scan. Also counts the files the incremental run rewrote.

    python benchmarks/growth.py [--scans 1000] [--points 20000]
"""

from __future__ import annotations

import argparse
import shutil
import sys
import time
from datetime import timedelta
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from archive.migrate import migrate  # noqa: E402
from tests import factory  # noqa: E402


def _mtimes(shelf: Path) -> dict[Path, int]:
    return {p: p.stat().st_mtime_ns for p in shelf.rglob("*") if p.is_file()}


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--scans", type=int, default=1000)
    parser.add_argument("--points", type=int, default=20_000)
    parser.add_argument("--workdir", default="/tmp/scanshelf-bench-growth")
    args = parser.parse_args()
    work = Path(args.workdir)
    shutil.rmtree(work, ignore_errors=True)
    start = factory.utc(2026, 1, 1)
    for i in range(args.scans):
        factory.write_las(work / f"source/north/scan_{i:05d}.las", args.points, start + timedelta(hours=6 * i),
                          seed=i, extra=False)
    t0 = time.perf_counter()
    migrate(str(work / "source"), str(work / "shelf"), previews=False)
    build = time.perf_counter() - t0

    new = start + timedelta(hours=6 * args.scans)
    factory.write_las(work / "source/north/scan_new.las", args.points, new, seed=10**6, extra=False)
    before = _mtimes(work / "shelf")
    t0 = time.perf_counter()
    result = migrate(str(work / "source"), str(work / "shelf"), previews=False)
    add = time.perf_counter() - t0
    after = _mtimes(work / "shelf")
    assert len(result.converted) == 1, result.summary()
    rewritten = sorted(str(p.relative_to(work / "shelf")) for p in after if before.get(p) != after[p])
    unchanged = sum(1 for p in before if before[p] == after.get(p))

    (work / "one/north").mkdir(parents=True)
    shutil.copy(work / "source/north/scan_new.las", work / "one/north/scan_new.las")
    t0 = time.perf_counter()
    migrate(str(work / "one"), str(work / "one-shelf"), previews=False)
    one = time.perf_counter() - t0

    print(f"shelf of {args.scans} scans × {args.points:,} points built in {build:.1f} s "
          f"({build / args.scans:.2f} s per scan)")
    print(f"adding one scan to it: {add:.2f} s; the same scan into an empty shelf: {one:.2f} s; "
          f"ratio {add / one:.2f}")
    print(f"files rewritten by the addition: {len(rewritten)} of {len(after)} ({unchanged} untouched)")
    for p in rewritten:
        print("   ", p)
    shutil.rmtree(work, ignore_errors=True)


if __name__ == "__main__":
    main()
