"""What the pictures of a migrate run cost: per-scan previews, the index.html maps and chart.

    python benchmarks/pictures.py [--points 1500000] [--scans 5] [--workdir DIR] [--save DIR] [--repeat 3]

Makes (or reuses, in ``--workdir``) the shelf of benchmarks/migrate.py's run (b): five demo scans
of 1.5M points, migrated with defaults. Then, in a fresh interpreter per repeat, it times in CPU
milliseconds (time.process_time; on a shared machine wall time mostly measures the neighbours):
importing the picture modules, one preview per epoch of the cube (as migrate draws it from the
scan's EpochGrid), the report's four maps and its coverage chart, and the whole index.html.
``--save DIR`` writes the previews and the page's embedded images there, to compare two versions
of the code pixel by pixel (and to look at them).
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

RUN = r"""
import base64, functools, json, re, sys, time
from pathlib import Path
c0 = time.process_time()
import archive.migrate  # what a migrate run has loaded before its first preview
c1 = time.process_time()
from archive.report import previews
c2 = time.process_time()
from archive.report import charts, html
c3 = time.process_time()
SPENT = {"import archive.migrate": [c1 - c0, 1], "import report.previews": [c2 - c1, 1],
         "import report.charts, html": [c3 - c2, 1]}
def timed(stage, owner, name):
    fn = getattr(owner, name)
    @functools.wraps(fn)
    def wrapper(*a, **k):
        c = time.process_time()
        try:
            return fn(*a, **k)
        finally:
            s = SPENT.setdefault(stage, [0.0, 0])
            s[0] += time.process_time() - c; s[1] += 1
    setattr(owner, name, wrapper)
for stage, name in [("report maps", "elevation_map"), ("report maps", "density_map"),
                    ("report maps", "change_map"), ("report chart", "coverage_chart")]:
    timed(stage, charts, name)
from archive.grids.binning import EpochGrid
from archive.grids.cube import cube_steps, read_spec
shelf = Path(SHELF)
cube = str(shelf / "grids" / "north.zarr")
spec, steps = read_spec(cube), cube_steps(cube)
epochs = [EpochGrid(steps.read("elevation", i), steps.read("elevation_std", i), steps.read("point_count", i), 0)
          for i in range(len(steps.times))]
save = SAVE
for i, epoch in enumerate(epochs):
    c = time.process_time()
    png = previews.preview_png(epoch, spec, title=steps.scan_ids[i])
    s = SPENT.setdefault("previews", [0.0, 0]); s[0] += time.process_time() - c; s[1] += 1
    if save:
        Path(save, f"preview-{i}.png").write_bytes(png)
(shelf / "index.html").unlink(missing_ok=True)  # no earlier page: every map is drawn
c = time.process_time()
html.write_index_html(shelf)
SPENT["report (all)"] = [time.process_time() - c, 1]
if save:
    page = (shelf / "index.html").read_text()
    Path(save, "index.html").write_text(page)
    for i, m in enumerate(re.findall(r"data:image/png;base64,([A-Za-z0-9+/=]+)", page)):
        Path(save, f"report-{i}.png").write_bytes(base64.b64decode(m))
print(json.dumps(SPENT))
"""


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--points", type=int, default=1_500_000)
    parser.add_argument("--scans", type=int, default=5)
    parser.add_argument("--workdir", default=None, help="reused when it holds a shelf; default: a fresh temp folder")
    parser.add_argument("--save", default=None, help="write the previews and the page's images here")
    parser.add_argument("--repeat", type=int, default=3, help="fresh processes; the lowest CPU per stage is shown")
    args = parser.parse_args()
    work = Path(args.workdir or tempfile.mkdtemp(prefix="scanshelf-bench-pictures-"))
    source, shelf = work / "source", work / "shelf"
    if not (shelf / "grids" / "north.zarr").exists():
        from benchmarks.profile_migrate import generate

        from archive.migrate import migrate

        if not source.exists():
            generate(source, args.points, args.scans)
        migrate(str(source), str(shelf))
    if args.save:
        Path(args.save).mkdir(parents=True, exist_ok=True)
    env = dict(os.environ, PYTHONPATH=os.pathsep.join(filter(None, [str(ROOT), os.environ.get("PYTHONPATH")])))
    code = RUN.replace("SHELF", repr(str(shelf))).replace("SAVE", repr(args.save))
    runs = []
    for _ in range(args.repeat):
        out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, env=env)
        if out.returncode:
            raise SystemExit(out.stderr[-3000:])
        runs.append(json.loads(out.stdout.strip().splitlines()[-1]))
    print(f"{args.scans} scans of {args.points:,} points; CPU ms, lowest of {args.repeat} fresh processes "
          f"(load average {os.getloadavg()[0]:.1f}: shared machine?)")
    best = {k: min(r[k][0] for r in runs) for k in runs[0]}
    for stage, cpu in best.items():
        calls = runs[0][stage][1]
        print(f"  {stage:28s} {1000 * cpu:8.0f} ms   {calls} call(s), {1000 * cpu / calls:.0f} ms each")
    pictures = best["previews"] + best["report maps"] + best["report chart"]
    print(f"  {'pictures (previews + maps + chart)':28s} {1000 * pictures:8.0f} ms   target ≤ 350 ms")


if __name__ == "__main__":
    main()
