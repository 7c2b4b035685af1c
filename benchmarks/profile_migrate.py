"""Profile a migration through the library API with cProfile, and print where the time goes.

    python benchmarks/profile_migrate.py [--points 5000000] [--scans 1] [--workdir DIR] [--sort tottime]
                                         [--out migrate.prof] [--previews/--no-previews]

Generates ``--scans`` demo scans of ``--points`` points each (uncompressed LAS 1.4, as
benchmarks/migrate.py does), migrates them in this process under cProfile and prints the top
entries by cumulative and by own CPU time (the profiler's clock is the process's CPU time, so
waiting and the neighbours' load on a shared machine do not show). The stats file (``--out``) opens in snakeviz or
``python -m pstats``. For native frames (numpy, Arrow, zstd) use py-spy on the same script:

    py-spy record --native -o migrate.svg -- python benchmarks/profile_migrate.py --points 20000000
"""

from __future__ import annotations

import argparse
import cProfile
import io
import pstats
import resource
import shutil
import sys
import tempfile
import time
from datetime import datetime, timezone
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))


def generate(folder: Path, points: int, scans: int) -> None:
    from archive.demo import scanner
    from archive.demo.writers import LasSpec, PointStats, write_las

    for i in range(scans):
        when = datetime(2026, 9, 1 + i, 6, tzinfo=timezone.utc)
        spec = LasSpec("1.4", 6, False, "EPSG:32633", True, 0.001, (500000.0, 7650000.0, 0.0),
                       extra=(("deviation", "float32", "range residual"),))
        path = folder / "north" / f"north_{when:%Y%m%d_%H%M%S}.las"
        write_las(path, scanner.sweep(scanner.STATIONS[0], when.timestamp(), points, (1, i)), spec, PointStats())


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--points", type=int, default=5_000_000)
    parser.add_argument("--scans", type=int, default=1)
    parser.add_argument("--workdir", default=None, help="default: a fresh folder under the system temp folder")
    parser.add_argument("--sort", default="tottime", choices=["tottime", "cumulative"])
    parser.add_argument("--top", type=int, default=30)
    parser.add_argument("--out", default=None, help="write the pstats file here")
    parser.add_argument("--previews", action=argparse.BooleanOptionalAction, default=True)
    args = parser.parse_args()
    work = Path(args.workdir) if args.workdir else Path(tempfile.mkdtemp(prefix="scanshelf-profile-"))
    source, shelf = work / "source", work / "shelf"
    if not source.exists():
        generate(source, args.points, args.scans)
    shutil.rmtree(shelf, ignore_errors=True)

    from archive.migrate import migrate  # imports are not what we profile

    # CPU clock of the whole process: on a shared machine wall time mostly measures the neighbours
    profile = cProfile.Profile(time.process_time)
    cpu0, wall0 = resource.getrusage(resource.RUSAGE_SELF), time.perf_counter()
    profile.enable()
    result = migrate(str(source), str(shelf), previews=args.previews)
    profile.disable()
    wall = time.perf_counter() - wall0
    cpu1 = resource.getrusage(resource.RUSAGE_SELF)
    cpu = (cpu1.ru_utime - cpu0.ru_utime) + (cpu1.ru_stime - cpu0.ru_stime)
    print(f"{result.points:,} points in {wall:.1f} s wall, {cpu:.1f} s CPU (all threads): "
          f"{result.points / cpu:,.0f} points per CPU-second")
    for key in dict.fromkeys([args.sort, "cumulative"]):
        out = io.StringIO()
        pstats.Stats(profile, stream=out).strip_dirs().sort_stats(key).print_stats(args.top)
        print(out.getvalue())
    if args.out:
        profile.dump_stats(args.out)
    if not args.workdir:
        shutil.rmtree(work, ignore_errors=True)


if __name__ == "__main__":
    main()
