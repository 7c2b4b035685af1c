"""Write a small demo archive and look at what it holds.

Run: python examples/make_demo.py [DEST]
"""

from __future__ import annotations

import sys
import tempfile
from collections import Counter

from archive.demo import DemoTruth, make_demo


def main(dest: str) -> None:
    truth = make_demo(dest, points_per_scan=5_000, weeks=1, overwrite=True)
    print(f"{truth.site['name']}: {truth.totals['scans']} scans, {truth.totals['points']:,} points in {dest}/source")
    print("formats:", dict(Counter((f.format, f.las_version, f.point_format) for f in truth.point_files)))
    for f in truth.point_files:
        if f.fault:
            print(f"fault {f.fault.kind:<15} {f.path}: {f.fault.expect}")
    for g in truth.grid_files:
        print(f"grid  {g.product:<15} {g.path} crs={g.crs}")
    again = DemoTruth.load(f"{dest}/demo-truth.json")
    assert again == truth, "the answer key reads back as written"


if __name__ == "__main__":
    main(sys.argv[1] if len(sys.argv) > 1 else tempfile.mkdtemp(prefix="scanshelf-demo-"))
