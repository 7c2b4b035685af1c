"""End-to-end migration benchmark: points per CPU-second, fixed cost per scan, pictures' share.

One run prints four figures, each measured in a fresh process (so peak RSS and CPU are its own;
CPU is user + system time of the process and its threads, from getrusage(RUSAGE_CHILDREN)):

  (a) one scan of N points (default 20M, demo scanner model, uncompressed LAS 1.4 point format 6
      with one extra-bytes dimension) migrated through the library, beside a plain laspy read +
      pyarrow write of the same table, and through the `scanshelf migrate` script (the same work;
      the script skips the interpreter's teardown and numpy's idle BLAS threads, see
      archive/cli/__init__.py); laspy + lazrs LAZ of the same points is the size reference;
  (b) five scans of M points (default 1.5M) migrated by the zero-config `scanshelf migrate
      SOURCE SHELF` script (survey, points, cubes, catalog, index.html), beside a plain laspy
      read + pyarrow write of the same five files, as a ratio;
  (c) the time spent drawing pictures in (b) (per-scan previews, index.html maps and charts) as
      a share of the migrate time;
  (d) the fixed cost per scan in (b): survey inspection, ledger writes, catalog (Items,
      collections, index), cube time steps;
  (e) with --spill-points N (e.g. 200000000; off by default, ~4 min and 6 GB of disk per 200M):
      one scan of N points, too big to sort in memory, migrated on the spill path: points per
      CPU-second and peak RSS (target ≤ 1.5 GiB).

    python benchmarks/migrate.py [--points 20000000] [--small-points 1500000] [--spill-points 0]
                                 [--repeat 3] [--workdir DIR] [--keep]

The default work folder is a fresh one under the system temp folder (tempfile). On a shared
machine the wall times are noisy, and so is CPU time: the same fresh-process migrate cost from
6.0 to 9.0 CPU-s in one afternoon on our 2-core test machine, and up to 25 % more within
minutes. So (a) runs ``--repeat`` times, each migrate followed by the plain write and the script (all
see the same phase of the machine), and prints every run, the median (the figure the target is judged
on) and the best (timeit's convention: what the machine does when nothing interferes); (b)
likewise, judged on the median ratio.
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent


def _child(code: str, root: Path = ROOT) -> dict:
    """Run ``code`` in a fresh interpreter with the ``archive`` package of ``root``; it prints one
    JSON line. Adds wall, CPU and peak RSS."""
    before = resource.getrusage(resource.RUSAGE_CHILDREN)
    t0 = time.perf_counter()
    env = dict(os.environ, PYTHONPATH=os.pathsep.join(filter(None, [str(root), os.environ.get("PYTHONPATH")])))
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, env=env)
    if out.returncode:
        raise SystemExit(f"benchmark step failed:\n{out.stderr[-3000:]}")
    wall = time.perf_counter() - t0
    after = resource.getrusage(resource.RUSAGE_CHILDREN)
    result = json.loads(out.stdout.strip().splitlines()[-1])
    result["wall_s"] = wall
    result["cpu_s"] = (after.ru_utime - before.ru_utime) + (after.ru_stime - before.ru_stime)
    result["peak_rss_mib"] = after.ru_maxrss / 1024  # the largest child so far (Linux: KiB)
    return result


GENERATE = """
import json
from datetime import datetime, timezone
from pathlib import Path
from archive.demo import scanner
from archive.demo.writers import LasSpec, PointStats, write_las
total = 0
for i, path in enumerate({paths!r}):
    when = datetime(2026, 9, 1 + i, 6, tzinfo=timezone.utc).timestamp()
    spec = LasSpec("1.4", 6, False, "EPSG:32633", True, 0.001, (500000.0, 7650000.0, 0.0),
                   extra=(("deviation", "float32", "range residual"),))
    stats = PointStats()
    write_las(Path(path), scanner.sweep(scanner.STATIONS[0], when, {n}, (1, i)), spec, stats)
    total += stats.count
print(json.dumps({{"points": total}}))
"""

# Wraps the named functions with wall and CPU timers; what each stage costs, in one run.
TIMERS = """
import functools, importlib, time
SPENT = {}
def _timed(stage, module, name):
    mod = importlib.import_module(module)
    owner, attr = (mod, name) if "." not in name else (getattr(mod, name.split(".")[0]), name.split(".")[1])
    fn = getattr(owner, attr)
    @functools.wraps(fn)
    def wrapper(*a, **k):
        w, c = time.perf_counter(), time.process_time()
        try:
            return fn(*a, **k)
        finally:
            s = SPENT.setdefault(stage, [0.0, 0.0, 0])
            s[0] += time.perf_counter() - w; s[1] += time.process_time() - c; s[2] += 1
    setattr(owner, attr, wrapper)
for stage, module, name in [
    ("previews", "archive.migrate", "_write_preview"),
    ("report maps", "archive.report.charts", "elevation_map"),
    ("report maps", "archive.report.charts", "density_map"),
    ("report maps", "archive.report.charts", "change_map"),
    ("report charts", "archive.report.charts", "coverage_chart"),
    ("report (all)", "archive.report", "write_index_html"),
    ("survey inspection", "archive.migrate", "_inspect_task"),
    ("ledger", "archive.ledger", "Ledger.record_file"),
    ("ledger", "archive.ledger", "Ledger.save_inspection"),
    ("catalog", "archive.migrate", "_write_catalog"),
    ("cube step", "archive.grids.cube", "write_epoch"),
    ("cube step", "archive.migrate", "_repair_cube"),
    ("points (sort+write)", "archive.migrate", "write_scan"),
    ("scan total", "archive.migrate", "convert_scan"),
    ("migrate (all)", "archive.migrate", "migrate"),
]:
    _timed(stage, module, name)
"""

MIGRATE = """
import json, resource
import importlib
m = importlib.import_module("archive.migrate")
r = m.migrate({source!r}, {shelf!r})
own = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024  # this process's peak (Linux: KiB)
print(json.dumps({{"points": r.points, "failed": r.failed, "spent": SPENT, "own_peak_mib": own}}))
"""

# the `scanshelf` script itself: main() ends the process through archive.cli._end (exit handlers,
# then os._exit without the interpreter's teardown), so the figures come out of an exit handler.
# main() sets OPENBLAS_NUM_THREADS before numpy loads; TIMERS (prepended) loads numpy first, so
# the same default is set here, ahead of it.
CLI_ENV = """
import os
os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
"""
CLI = """
import atexit, json, sys
from archive.cli import main
sys.argv = ["scanshelf", "migrate", {source!r}, {shelf!r}]
atexit.register(lambda: print(json.dumps({{"spent": SPENT}})))
main()
"""

# scale.py's writer: sweep-ordered LAS 1.4 fmt 6 straight from numpy, fast enough for 200M points
GENERATE_BIG = """
import json
from datetime import datetime, timezone
from pathlib import Path
from benchmarks.scale import write_scan
write_scan(Path({path!r}), {n}, datetime(2026, 9, 1, 6, tzinfo=timezone.utc), 1)
print(json.dumps({{}}))
"""

LAZ = """
import json, laspy
with laspy.open({src!r}) as reader, laspy.open({dst!r}, mode="w", header=reader.header, do_compress=True,
                                               laz_backend=laspy.LazBackend.Lazrs) as writer:
    for chunk in reader.chunk_iterator(2_000_000):
        writer.write_points(chunk)
print(json.dumps({{}}))
"""

# laspy read + pyarrow write of the same points: float64 x, y, z and every other dimension
PLAIN = """
import json, time, laspy, numpy as np, pyarrow as pa, pyarrow.parquet as pq
rows = 0
for src, dst in {pairs!r}:
    tables = []
    with laspy.open(src) as reader:
        for c in reader.chunk_iterator(2_000_000):
            cols = {{"x": np.asarray(c.x), "y": np.asarray(c.y), "z": np.asarray(c.z)}}
            for name in c.point_format.dimension_names:
                if name not in ("X", "Y", "Z"):
                    cols[name] = np.asarray(c[name])
            tables.append(pa.table(cols))
    table = pa.concat_tables(tables)
    pq.write_table(table, dst, compression="zstd", use_dictionary={dictionary})
    rows += table.num_rows
print(json.dumps({{"rows": rows}}))
"""


def _row(name: str, value: str, note: str = "") -> None:
    print(f"{name:52s} {value:>14s}   {note}".rstrip())


def _stages(spent: dict, scans: int) -> None:
    for stage, (wall, cpu, calls) in sorted(spent.items(), key=lambda kv: -kv[1][0]):
        _row(f"  {stage} ({calls} calls)", f"{wall:.2f} s", f"CPU {cpu:.2f} s, {1000 * wall / scans:.0f} ms/scan")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--points", type=int, default=20_000_000, help="points of the big scan (a)")
    parser.add_argument("--small-points", type=int, default=1_500_000, help="points of each of the 5 scans (b)")
    parser.add_argument("--spill-points", type=int, default=0, help="points of the spill-path scan (e); 0 skips it")
    parser.add_argument("--repeat", type=int, default=3, help="runs of (a) and of (b), each followed by its plain read + write")
    parser.add_argument("--workdir", default=None, help="default: a fresh folder under the system temp folder")
    parser.add_argument("--keep", action="store_true", help="keep the generated files")
    args = parser.parse_args()
    work = Path(args.workdir) if args.workdir else Path(tempfile.mkdtemp(prefix="scanshelf-bench-migrate-"))
    shutil.rmtree(work, ignore_errors=True)
    big_src, small_src = work / "big" / "north", work / "small" / "north"
    big_src.mkdir(parents=True)
    small_src.mkdir(parents=True)
    las = big_src / "north_20260901_060000.las"
    small = [small_src / f"north_202609{1 + i:02d}_060000.las" for i in range(5)]

    t0 = time.perf_counter()
    n = _child(GENERATE.format(paths=[str(las)], n=args.points))["points"]
    n5 = _child(GENERATE.format(paths=[str(p) for p in small], n=args.small_points))["points"]
    print(f"generated {n:,} + 5 × {n5 // 5:,} scan-ordered points as LAS 1.4 fmt 6 in "
          f"{time.perf_counter() - t0:.0f} s ({las.stat().st_size / n:.1f} bytes/point uncompressed)")

    # (a) one big scan through the library, and the plain write of it, run after run
    runs, scripts = [], []
    for _ in range(max(1, args.repeat)):
        shutil.rmtree(work / "big-shelf", ignore_errors=True)
        mig = _child(TIMERS + MIGRATE.format(source=str(work / "big"), shelf=str(work / "big-shelf")))
        assert mig["points"] == n and not mig["failed"], mig
        runs.append((mig, _child(PLAIN.format(pairs=[(str(las), str(work / "plain.parquet"))], dictionary=False))))
        shutil.rmtree(work / "big-script-shelf", ignore_errors=True)
        scripts.append(_child(CLI_ENV + TIMERS + CLI.format(source=str(work / "big"), shelf=str(work / "big-script-shelf"))))
    runs.sort(key=lambda run: run[0]["cpu_s"])
    mig, plain = runs[len(runs) // 2]  # the median migrate, and the plain write that followed it
    shelf_bytes = sum(p.stat().st_size for p in (work / "big-shelf" / "points").rglob("*.parquet"))
    _child(LAZ.format(src=str(las), dst=str(work / "same.laz")))
    laz_bytes = (work / "same.laz").stat().st_size
    plain_bytes = (work / "plain.parquet").stat().st_size

    # (b) five small scans through the CLI, and the plain read + write of the same files
    pairs = []
    for _ in range(max(1, args.repeat)):
        shutil.rmtree(work / "small-shelf", ignore_errors=True)
        cli = _child(CLI_ENV + TIMERS + CLI.format(source=str(work / "small"), shelf=str(work / "small-shelf")))
        pairs.append((cli, _child(PLAIN.format(pairs=[(str(p), str(work / f"plain-{i}.parquet")) for i, p in enumerate(small)],
                                               dictionary=False))))
    pairs.sort(key=lambda pair: pair[0]["cpu_s"] / pair[1]["cpu_s"])
    cli, plain5 = pairs[len(pairs) // 2]  # the run of the median CPU ratio
    spent = cli["spent"]
    pictures = sum(spent.get(k, [0.0])[0] for k in ("previews", "report maps", "report charts"))

    print("\nmachine: " + f"{os.cpu_count()} cores, load average {os.getloadavg()[0]:.1f} at the end (shared?)")
    print(f"\n(a) one scan, library migrate() with defaults (previews, catalog, index.html); {len(runs)} runs")
    _row("points", f"{n:,}")
    _row("migrate CPU (s), runs fastest first", " / ".join(f"{m['cpu_s']:.2f}" for m, _ in runs), "(plain: "
         + " / ".join(f"{p['cpu_s']:.2f}" for _, p in runs) + ")")
    _row("best run: migrate points per CPU-second", f"{n / runs[0][0]['cpu_s']:,.0f}")
    print("median run:")
    _row("migrate wall / CPU (s)", f"{mig['wall_s']:.1f} / {mig['cpu_s']:.1f}")
    _row("migrate points per CPU-second", f"{n / mig['cpu_s']:,.0f}", "target ≥ 3,000,000")
    _row("migrate points per wall second", f"{n / mig['wall_s']:,.0f}")
    _row("  the migrate() call alone (no interpreter start, imports)",
         f"{n / mig['spent']['migrate (all)'][1]:,.0f}", "points per CPU-second")
    script = sorted(scripts, key=lambda r: r["cpu_s"])[len(scripts) // 2]
    _row("the `scanshelf migrate` script, CPU (s), runs fastest first", " / ".join(f"{r['cpu_s']:.2f}" for r in sorted(scripts, key=lambda r: r["cpu_s"])))
    _row("  its median run: points per CPU-second", f"{n / script['cpu_s']:,.0f}", "(no interpreter teardown, one BLAS thread)")
    _row("plain laspy read + pyarrow write wall / CPU (s)", f"{plain['wall_s']:.1f} / {plain['cpu_s']:.1f}")
    _row("plain points per CPU-second", f"{n / plain['cpu_s']:,.0f}")
    _row("migrate CPU / plain CPU", f"{mig['cpu_s'] / plain['cpu_s']:.2f}")
    _row("shelf bytes/point", f"{shelf_bytes / n:.2f}")
    _row("LAZ (laspy+lazrs) bytes/point", f"{laz_bytes / n:.2f}")
    _row("plain Parquet (float64 xyz, zstd) bytes/point", f"{plain_bytes / n:.2f}")
    _row("shelf / LAZ size ratio", f"{shelf_bytes / laz_bytes:.3f}", "target ≤ 1.1")
    _row("migrate peak RSS (MiB)", f"{mig['own_peak_mib']:.0f}")
    _stages(mig["spent"], 1)

    print(f"\n(b) five scans of {n5 // 5:,} points, `scanshelf migrate SOURCE SHELF` (zero config); {len(pairs)} runs")
    _row("ratio CLI / plain CPU, runs lowest first", " / ".join(f"{c['cpu_s'] / p['cpu_s']:.2f}" for c, p in pairs))
    print("the run of the median ratio:")
    _row("CLI wall / CPU (s), incl. interpreter start", f"{cli['wall_s']:.1f} / {cli['cpu_s']:.1f}")
    _row("plain read + write wall / CPU (s)", f"{plain5['wall_s']:.1f} / {plain5['cpu_s']:.1f}")
    _row("ratio CLI / plain, wall", f"{cli['wall_s'] / plain5['wall_s']:.2f}", "target ≤ 2")
    _row("ratio CLI / plain, CPU", f"{cli['cpu_s'] / plain5['cpu_s']:.2f}")
    _row("CLI points per CPU-second", f"{n5 / cli['cpu_s']:,.0f}")
    migrate_wall, migrate_cpu = spent["migrate (all)"][:2]
    pictures_cpu = sum(spent.get(k, [0.0, 0.0])[1] for k in ("previews", "report maps", "report charts"))
    print("\n(c) pictures")
    _row("pictures (previews + report maps + charts) wall / CPU (s)", f"{pictures:.2f} / {pictures_cpu:.2f}")
    _row("pictures / migrate() wall time", f"{100 * pictures / migrate_wall:.1f} %", "target ≤ 10 %")
    _row("pictures / migrate() CPU time", f"{100 * pictures_cpu / migrate_cpu:.1f} %")
    print("\n(d) where the CLI run's time went (wall; stages nest: 'scan total' holds previews and points)")
    _stages(spent, 5)
    if args.spill_points:
        spill_src = work / "spill" / "north"
        spill_src.mkdir(parents=True)
        _child(GENERATE_BIG.format(path=str(spill_src / "north_20260901_060000.las"), n=args.spill_points))
        big = _child(TIMERS + MIGRATE.format(source=str(work / "spill"), shelf=str(work / "spill-shelf")))
        assert big["points"] == args.spill_points and not big["failed"], big
        print(f"\n(e) one scan of {args.spill_points:,} points on the spill path (library migrate(), defaults)")
        _row("migrate wall / CPU (s)", f"{big['wall_s']:.1f} / {big['cpu_s']:.1f}")
        _row("migrate points per CPU-second", f"{args.spill_points / big['cpu_s']:,.0f}")
        _row("migrate peak RSS (MiB)", f"{big['own_peak_mib']:.0f}", "target ≤ 1,536")
    if not args.keep:
        shutil.rmtree(work, ignore_errors=True)


if __name__ == "__main__":
    main()
