"""Profile a migration through the library API with cProfile, and print where the time goes.

    python benchmarks/profile_migrate.py [--points 5000000] [--scans 1] [--workdir DIR] [--sort tottime]
                                         [--out migrate.prof] [--previews/--no-previews]

Generates ``--scans`` demo scans of ``--points`` points each (uncompressed LAS 1.4, as
benchmarks/migrate.py does), migrates them in this process under cProfile and prints the top
entries by cumulative and by own CPU time (the profiler's clock is the process's CPU time, so
waiting and the neighbours' load on a shared machine do not show). Before those it splits the
CPU a fresh ``python`` process would spend: interpreter start, imports, the exit, the library calls
named in LIBRARY, the numpy kernels our code calls, and our own Python frames; the two ceilings it
prints are the rates if our frames (then also their numpy kernels) cost nothing. The stats file
(``--out``) opens in snakeviz or ``python -m pstats``. For native frames (numpy, Arrow, zstd) use py-spy on the same script:

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

    from archive.migrate import migrate

    imports = _import_cost(work, migrate, args.previews)  # measured apart: the profiler inflates imports 2x
    process = _process_cost(work, args.previews)

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
    _print_split(pstats.Stats(profile), result.points, cpu, imports, process)
    for key in dict.fromkeys([args.sort, "cumulative"]):
        out = io.StringIO()
        pstats.Stats(profile, stream=out).strip_dirs().sort_stats(key).print_stats(args.top)
        print(out.getvalue())
    if args.out:
        profile.dump_stats(args.out)
    if not args.workdir:
        shutil.rmtree(work, ignore_errors=True)


# Library calls that our code cannot make cheaper, by how pstats names them: (label, file part,
# function, which time). "cum" counts the call with everything under it; "own" its own time (C calls).
LIBRARY = (
    ("pyarrow Parquet writer (write_table)", "parquet/core.py", "write_table", "cum"),
    ("file reads (readinto)", "~", "<method 'readinto' of '_io.BufferedReader' objects>", "own"),
    ("SHA-256 of source and output", "~", "<method 'update' of '_hashlib.HASH' objects>", "own"),
    ("other threads (zarr's event loop) while waited for", "~", "<method 'acquire' of '_thread.lock' objects>", "own"),
)

# A fresh `python` that imports archive.migrate, migrates 2,000 points and exits; prints the
# process's CPU when the script starts, after the import and after the call.
PROCESS = """
import json, resource
def cpu():
    r = resource.getrusage(resource.RUSAGE_SELF)
    return r.ru_utime + r.ru_stime
started = cpu()
from archive.migrate import migrate
imported = cpu()
migrate({source!r}, {shelf!r}, previews={previews!r})
print(json.dumps({{"started": started, "imported": imported, "called": cpu()}}))
"""


def _import_cost(work: Path, migrate, previews: bool) -> float:
    """CPU of the imports that migrate() makes on its first call: a 2,000-point migrate run twice,
    without the profiler; the first run pays the imports, the second does the same work without."""
    source = work / "warm-up-source"
    if not source.exists():
        generate(source, 2_000, 1)
    spent = []
    for _ in range(2):
        shutil.rmtree(work / "warm-up-shelf", ignore_errors=True)
        before = time.process_time()
        migrate(str(source), str(work / "warm-up-shelf"), previews=previews)
        spent.append(time.process_time() - before)
    shutil.rmtree(work / "warm-up-shelf", ignore_errors=True)
    return max(0.0, spent[0] - spent[1])


def _process_cost(work: Path, previews: bool) -> dict[str, float]:
    """CPU that a fresh process spends outside the migrate() call: interpreter start, importing
    archive.migrate, and the exit (the interpreter's final collection and teardown of every module
    the call loaded): the child's own clock against its total. Migrates `_import_cost`'s source."""
    from benchmarks.migrate import _child

    shelf = work / "warm-up-shelf"
    shutil.rmtree(shelf, ignore_errors=True)
    run = _child(PROCESS.format(source=str(work / "warm-up-source"), shelf=str(shelf), previews=previews))
    shutil.rmtree(shelf, ignore_errors=True)
    return {"interpreter start": run["started"], "import archive.migrate": run["imported"] - run["started"],
            "exit and teardown": run["cpu_s"] - run["called"]}


def _print_split(stats: pstats.Stats, points: int, cpu: float, imports: float, process: dict[str, float]) -> None:
    """Library calls against everything else (our own code and the numpy it runs), and the rate
    the run would reach if everything else cost nothing; the fresh process's own costs beside."""
    outside = sum(process.values())
    total = sum(tt for _, _, tt, _, _ in stats.stats.values()) + imports + outside  # type: ignore[attr-defined]
    print(f"\nwhere {total:.2f} CPU-s of a fresh process would go (the profiled run, {cpu:.2f} s, the first "
          "call's imports, and the process around the call):")
    for label, spent in process.items():
        print(f"  {label + ' (a fresh process)':58s} {spent:6.2f} s  {100 * spent / total:5.1f} %")
    print(f"  {'imports on the first call (without the profiler)':58s} {imports:6.2f} s  {100 * imports / total:5.1f} %")
    library = imports + outside
    for label, where, name, kind in LIBRARY:
        spent = 0.0
        for (filename, _, function), (_, _, tt, ct, _) in stats.stats.items():  # type: ignore[attr-defined]
            if function == name and where in filename:
                spent = max(spent, ct) if kind == "cum" else spent + tt  # cum: the outermost call holds the rest
        library += spent
        print(f"  {label:58s} {spent:6.2f} s  {100 * spent / total:5.1f} %")
    kernels = sum(tt for (filename, _, function), (_, _, tt, _, _) in stats.stats.items()  # type: ignore[attr-defined]
                  if filename == "~" and "numpy" in function)
    print(f"  {'numpy kernels that our code calls (take, astype, ...)':58s} {kernels:6.2f} s  {100 * kernels / total:5.1f} %")
    rest = total - library - kernels
    print(f"  {'our Python frames (with the numpy operators inline)':58s} {rest:6.2f} s  {100 * rest / total:5.1f} %")
    print(f"  at most, if our Python frames cost nothing: {points / (library + kernels):,.0f} points per CPU-second; "
          f"if the numpy kernels did too: {points / library:,.0f} (this run: {points / total:,.0f})\n")


if __name__ == "__main__":
    main()
