"""Cost of encoding LAS integers per axis: DECIMAL, float64 with the per-point round-trip check,
and float64 with the raw integers kept (no check). Prints points/s and CPU ms per chunk.

    python benchmarks/coords.py --points 2000000
"""

from __future__ import annotations

import argparse
import time

import numpy as np

from archive.points.coords import AxisEncoding

CASES = [
    ("decimal, scale 0.001", 0.001, 500_000.0),
    ("float, scale 1.16451354e-06, checked", 1.16451354e-06, 1_692_500.352),
    ("float, scale 1.0000000000000002e-09, raw kept", 1.0000000000000002e-09, 7_650_100.0),
]


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--points", type=int, default=2_000_000)
    parser.add_argument("--repeat", type=int, default=5)
    args = parser.parse_args()
    raw = np.random.default_rng(0).integers(-(2**30), 2**30, args.points).astype(np.int32)
    for name, scale, offset in CASES:
        enc = AxisEncoding.for_las(scale, offset)
        runs = []
        for _ in range(args.repeat):
            cpu, wall = time.process_time(), time.perf_counter()
            enc.from_las(raw)
            runs.append((time.process_time() - cpu, time.perf_counter() - wall))
        cpu, wall = min(runs, key=lambda r: r[1])
        print(f"{name:48s} {args.points / wall / 1e6:7.0f} M pts/s  {cpu * 1e3:6.1f} ms CPU per {args.points:,} points")


if __name__ == "__main__":
    main()
