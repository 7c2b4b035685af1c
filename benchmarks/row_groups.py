"""Write cost of per-scan row groups against fixed 262,144-row groups, same scans, same run.

    python benchmarks/row_groups.py [--points 1500000] [--scans 5] [--rounds 3] [--workdir DIR]

Generates ``--scans`` demo scans (uncompressed LAS 1.4, as benchmarks/migrate.py does) and runs
``migrate()`` on them in a fresh process per round and setting, alternating the settings, with
row groups from ``row_group_rows`` (the default) and with 262,144 rows. Prints the CPU seconds of
each run (user + system of the process; on a shared machine wall time mostly measures the
neighbours), the shelf's bytes per point and its row-group count.
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import subprocess
import sys
import tempfile
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]

RUN = """
import json, resource, sys
from pathlib import Path
import pyarrow.parquet as pq
from archive.migrate import migrate
r = migrate({source!r}, {shelf!r}, row_group_points={rows!r})
use = resource.getrusage(resource.RUSAGE_SELF)
files = list(Path({shelf!r}, "points").rglob("*.parquet"))
print(json.dumps({{"cpu": use.ru_utime + use.ru_stime, "points": r.points,
                  "bytes": sum(f.stat().st_size for f in files),
                  "groups": sum(pq.ParquetFile(f).metadata.num_row_groups for f in files)}}))
"""


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--points", type=int, default=1_500_000)
    parser.add_argument("--scans", type=int, default=5)
    parser.add_argument("--rounds", type=int, default=3)
    parser.add_argument("--workdir", default=None, help="default: a fresh folder under the system temp folder")
    args = parser.parse_args()
    sys.path.insert(0, str(ROOT / "benchmarks"))
    from profile_migrate import generate

    work = Path(args.workdir) if args.workdir else Path(tempfile.mkdtemp(prefix="scanshelf-bench-rowgroups-"))
    source = work / "source"
    if not source.exists():
        generate(source, args.points, args.scans)
    env = dict(os.environ, PYTHONPATH=os.pathsep.join(filter(None, [str(ROOT), os.environ.get("PYTHONPATH")])))
    results: dict[str, list[dict]] = {}
    for _ in range(args.rounds):
        for name, rows in (("per-scan (row_group_rows)", None), ("262,144 rows", 262_144)):
            shelf = work / "shelf"
            shutil.rmtree(shelf, ignore_errors=True)
            code = RUN.format(source=str(source), shelf=str(shelf), rows=rows)
            out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, env=env, check=True)
            results.setdefault(name, []).append(json.loads(out.stdout.strip().splitlines()[-1]))
    print(f"{args.scans} scans of {args.points:,} points; migrate() CPU seconds per round (shared machine?)")
    for name, runs in results.items():
        last = runs[-1]
        cpus = " / ".join(f"{r['cpu']:.1f}" for r in runs)
        print(f"  {name:28s} CPU {cpus} s   "
              f"{last['bytes'] / last['points']:.2f} bytes/point   {last['groups']} row groups")
    if not args.workdir:
        shutil.rmtree(work, ignore_errors=True)


if __name__ == "__main__":
    main()
