"""Start-up cost: what every `scanshelf` command and every dask worker pays before any work.

Each figure is the median of --repeat fresh interpreters: CPU (user + system, getrusage of the
child) and wall time, for `import archive.migrate` (a migrate run, a dask worker unpickling a
task), `import archive.cli` (the console entry) and `scanshelf --help`; a bare interpreter and
`import numpy, pyarrow, pyarrow.parquet, fsspec` (what migrate cannot do without) are the floors.
It also lists the heavy libraries each import leaves in sys.modules.

    python benchmarks/startup.py [--repeat 5]

Profile one of them further with: python -X importtime -c "import archive.migrate" 2>&1 | sort -t'|' -k2 -n
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import statistics
import subprocess
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
HEAVY = ("xarray", "dask", "zarr", "pandas", "matplotlib", "rasterio", "scipy", "pystac", "jsonschema", "pyproj")
CASES = {
    "python (bare)": "pass",
    "numpy+pyarrow+fsspec": "import numpy, pyarrow, pyarrow.compute, pyarrow.parquet, fsspec",
    "import archive.migrate": "import archive.migrate",
    "import archive.cli": "import archive.cli",
    "scanshelf --help": "from archive.cli import cli\ntry:\n    cli(['--help'])\nexcept SystemExit:\n    pass",
}
REPORT = "\nimport json, sys\nprint(json.dumps(sorted({m.partition('.')[0] for m in sys.modules} & set(%r))), file=sys.stderr)"


def _run(code: str, env: dict) -> tuple[float, float, list[str]]:
    before = resource.getrusage(resource.RUSAGE_CHILDREN)
    t0 = time.perf_counter()
    out = subprocess.run([sys.executable, "-c", code + REPORT % (HEAVY,)], capture_output=True, text=True, env=env)
    wall = time.perf_counter() - t0
    after = resource.getrusage(resource.RUSAGE_CHILDREN)
    if out.returncode:
        raise SystemExit(f"{code!r} failed:\n{out.stderr[-2000:]}")
    cpu = (after.ru_utime - before.ru_utime) + (after.ru_stime - before.ru_stime)
    return cpu, wall, json.loads(out.stderr.strip().splitlines()[-1])


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--repeat", type=int, default=5)
    args = parser.parse_args()
    env = dict(os.environ, PYTHONPATH=os.pathsep.join(filter(None, [str(ROOT), os.environ.get("PYTHONPATH")])))
    print(f"median of {args.repeat} fresh interpreters; PYTHONDONTWRITEBYTECODE={os.environ.get('PYTHONDONTWRITEBYTECODE', '')!r}")
    print(f"{'':26} {'CPU s':>7} {'wall s':>7}  heavy libraries loaded")
    for name, code in CASES.items():
        runs = [_run(code, env) for _ in range(args.repeat)]
        cpu = statistics.median(r[0] for r in runs)
        wall = statistics.median(r[1] for r in runs)
        print(f"{name:26} {cpu:7.2f} {wall:7.2f}  {', '.join(runs[-1][2]) or '-'}")


if __name__ == "__main__":
    main()
