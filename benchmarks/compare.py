"""Before and after: the CPU of one fresh-process migrate, two versions of the code run in turns.

    python benchmarks/compare.py REF [--points 20000000] [--pairs 6] [--workdir DIR]

On our 2-core test machine the same migrate cost from 6.0 to 9.0 CPU-s in one afternoon, and up
to 25 % more within minutes, so two benchmark runs taken minutes apart cannot show a 5 % change. This checks out
REF (any git revision: a commit, a branch, HEAD~3) in a temporary worktree, generates one demo
scan (as benchmarks/migrate.py does) and migrates it with REF's code and with the working tree's,
one right after the other, ``--pairs`` times, so both versions of a pair meet the same phase of
the machine. Which version goes first alternates: in our trials the first run of a pair often
cost 0.1-0.3 CPU-s more, whichever version it was. It prints every pair, both means, the mean
paired difference with its standard deviation, the median one (a pair hit by a neighbour's
burst moves it less), and the number of pairs in which the working tree was faster.
"""

from __future__ import annotations

import argparse
import shutil
import statistics
import subprocess
import sys
import tempfile
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from benchmarks.migrate import GENERATE, ROOT, _child  # noqa: E402

MIGRATE = """
import json, sys
sys.path.insert(0, {root!r})  # before the current folder, which `python -c` puts first
from archive.migrate import migrate
where = sys.modules["archive.migrate"].__file__
assert where.startswith({root!r}), f"archive imported from {{where}}, not from {root!r}"
r = migrate({source!r}, {shelf!r})
print(json.dumps({{"points": r.points, "failed": r.failed}}))
"""


def _run(root: Path, source: Path, shelf: Path, points: int) -> float:
    shutil.rmtree(shelf, ignore_errors=True)
    run = _child(MIGRATE.format(root=str(root), source=str(source), shelf=str(shelf)), root=root)
    assert run["points"] == points and not run["failed"], run
    return run["cpu_s"]


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("ref", help="the git revision to compare the working tree with")
    parser.add_argument("--points", type=int, default=20_000_000)
    parser.add_argument("--pairs", type=int, default=6)
    parser.add_argument("--workdir", default=None, help="default: a fresh folder under the system temp folder")
    args = parser.parse_args()
    work = Path(args.workdir) if args.workdir else Path(tempfile.mkdtemp(prefix="scanshelf-compare-"))
    before = work / "before"
    shutil.rmtree(before, ignore_errors=True)
    subprocess.run(["git", "-C", str(ROOT), "worktree", "prune"], check=True)  # forget one an interrupted run left
    subprocess.run(["git", "-C", str(ROOT), "worktree", "add", "--detach", "--quiet", str(before), args.ref], check=True)
    try:
        source = work / "source"
        las = source / "north" / "north_20260901_060000.las"
        if not las.exists():
            las.parent.mkdir(parents=True, exist_ok=True)
            _child(GENERATE.format(paths=[str(las)], n=args.points))
        pairs = []
        for i in range(args.pairs):
            if i % 2:  # the first run of a pair tends to cost more: alternate which version goes first
                new = _run(ROOT, source, work / "shelf", args.points)
                old = _run(before, source, work / "shelf", args.points)
            else:
                old = _run(before, source, work / "shelf", args.points)
                new = _run(ROOT, source, work / "shelf", args.points)
            pairs.append((old, new))
            print(f"pair {i + 1}: {args.ref} {old:.2f} CPU-s, working tree {new:.2f} CPU-s ({new - old:+.2f})", flush=True)
        olds, news = zip(*pairs)
        diffs = [n - o for o, n in pairs]
        print(f"\n{args.points:,} points, {len(pairs)} pairs")
        print(f"{args.ref}: mean {statistics.mean(olds):.2f} CPU-s, {args.points / statistics.mean(olds):,.0f} points per CPU-second")
        print(f"working tree: mean {statistics.mean(news):.2f} CPU-s, {args.points / statistics.mean(news):,.0f} points per CPU-second")
        spread = statistics.stdev(diffs) if len(diffs) > 1 else 0.0
        print(f"paired difference: mean {statistics.mean(diffs):+.2f} ± {spread:.2f} CPU-s "
              f"({100 * statistics.mean(diffs) / statistics.mean(olds):+.1f} %), median {statistics.median(diffs):+.2f} CPU-s "
              f"({100 * statistics.median(diffs) / statistics.median(olds):+.1f} %); the working tree faster in "
              f"{sum(d < 0 for d in diffs)} of {len(diffs)} pairs")
    finally:
        subprocess.run(["git", "-C", str(ROOT), "worktree", "remove", "--force", str(before)], check=False)
        if not args.workdir:
            shutil.rmtree(work, ignore_errors=True)


if __name__ == "__main__":
    main()
