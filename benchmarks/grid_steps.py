"""Per-scan grid costs of a migration: binning a scan's batches, and appending its cube step.

    python benchmarks/grid_steps.py [--points 1500000] [--nx 2523] [--ny 1468] [--scans 5] [--rounds 3]
                                    [--scanner]

Prints CPU milliseconds (time.process_time: this process and its threads, so zarr's codec
threads count; the lowest of --rounds rounds, because a shared machine only ever adds time) for

1. ``GridAccumulator.add`` over one scan fed as migrate feeds it: batches of 2^18 points in
   block order (a stand-in for Hilbert order: each batch covers a compact block of the grid),
   and ``finish``, on a grid of --nx × --ny cells at 0.5 m; with --scanner, the points of the
   demo scanner model (archive.demo.scanner, what benchmarks/migrate.py writes), in block
   order too, on the grid migrate derives for them (their bounds, the default 10 m margin and 1 m
   cells): smoother maps, which compress as the migrate benchmark's cube steps do;
2. ``write_epoch``: the first step (creates the cube) and each append of --scans scans;
3. the fixed part of an append: the same on a 64 × 64 grid, where there is almost nothing to
   encode;
4. the codec floor of one step: numcodecs Quantize + Zstd of the step's stored inner chunks
   alone (what any writer of these bytes must spend), beside the map shards as write_epoch
   encodes them (``_map_shards``: the same plus padding, emptiness tests, index and CRC).
"""

from __future__ import annotations

import argparse
import shutil
import tempfile
import time
from datetime import datetime, timedelta, timezone
from pathlib import Path

import numcodecs
import numpy as np

from archive.grids import GridAccumulator, GridSpec, write_epoch
from archive.grids.binning import EpochGrid
from archive.grids.cube import CUBE_VARS, FLOAT_VARS, QUANTIZE_DIGITS, _map_shards, map_shard

BATCH = 1 << 18  # rows per batch handed to the binner (archive.points.write.BATCH_ROWS)


def scan_points(spec: GridSpec, n: int, seed: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """A scanner-like cloud: dense near the scanner (grid centre-south), sparse far out, a slope."""
    rng = np.random.default_rng(seed)
    r = spec.cell * min(spec.nx, spec.ny) * 0.9 * np.sqrt(rng.uniform(0.0005, 1, n)) ** 2
    a = rng.uniform(0, np.pi, n)
    x = spec.x0 + spec.cell * spec.nx / 2 + r * np.cos(a)
    y = spec.y0 + spec.cell * spec.ny * 0.05 + r * np.sin(a)
    z = 820.0 + 0.05 * (y - spec.y0) + rng.normal(0, 0.05, n)
    block = 64 * spec.cell  # batches in block order, blocks row after row
    order = np.lexsort((np.floor((x - spec.x0) / block), np.floor((y - spec.y0) / block)))
    return x[order], y[order], z[order]


def scanner_points(points: int) -> tuple[GridSpec, np.ndarray, np.ndarray, np.ndarray]:
    from archive.demo import scanner

    chunks = list(scanner.sweep(scanner.STATIONS[0], datetime(2026, 9, 1, 6, tzinfo=timezone.utc).timestamp(),
                                points, (1, 0)))
    x, y, z = (np.concatenate([c[k] for c in chunks]) for k in "xyz")
    spec = GridSpec.from_bounds("north", (x.min(), y.min(), x.max(), y.max()), 1.0, 10.0, "EPSG:32633")
    block = 64 * spec.cell  # batches in block order, as scan_points
    order = np.lexsort((np.floor((x - spec.x0) / block), np.floor((y - spec.y0) / block)))
    return spec, x[order], y[order], z[order]


def binning(spec: GridSpec, x: np.ndarray, y: np.ndarray, z: np.ndarray, rounds: int) -> EpochGrid:
    points = x.size
    add = fin = float("inf")
    for _ in range(rounds):
        acc = GridAccumulator(spec)
        c0 = time.process_time()
        for i in range(0, points, BATCH):
            acc.add(x[i:i + BATCH], y[i:i + BATCH], z[i:i + BATCH])
        c1 = time.process_time()
        grid = acc.finish()
        c2 = time.process_time()
        add, fin = min(add, c1 - c0), min(fin, c2 - c1)
    calls = -(-points // BATCH)
    print(f"binning {points:,} points on {spec.nx} x {spec.ny} cells: add {1e3 * add:.0f} ms "
          f"({1e3 * add / calls:.1f} ms per call, {calls} calls), finish {1e3 * fin:.0f} ms CPU")
    return grid


def steps(spec: GridSpec, epoch: EpochGrid, scans: int, rounds: int, label: str) -> None:
    t0 = datetime(2026, 9, 1, 6, tzinfo=timezone.utc)
    best: list[float] | None = None
    with tempfile.TemporaryDirectory() as tmp:
        url = str(Path(tmp) / "north.zarr")
        for _ in range(rounds):
            shutil.rmtree(url, ignore_errors=True)
            spent = []
            for i in range(scans):
                t = t0 + timedelta(days=i)
                c = time.process_time()
                write_epoch(url, spec, t, f"north-{t:%Y%m%dT%H%M%SZ}", epoch)
                spent.append(time.process_time() - c)
            best = spent if best is None else [min(a, b) for a, b in zip(best, spent)]
    assert best is not None
    appends = best[1:]
    print(f"cube steps, {label}: first (creates the cube) {1e3 * best[0]:.0f} ms, appends "
          f"{', '.join(f'{1e3 * v:.0f}' for v in appends)} ms CPU (mean {1e3 * sum(appends) / len(appends):.0f})")


def codec_floor(spec: GridSpec, epoch: EpochGrid, rounds: int) -> None:
    chunk, shard = map_shard(spec.ny, spec.nx)
    cy, cx = chunk[1:]
    zstd, quantize = numcodecs.Zstd(level=3, checksum=False), numcodecs.Quantize(QUANTIZE_DIGITS, dtype="<f4")
    stored = []  # the inner chunks a step stores (not all at the fill value), as the codecs get them
    for name in CUBE_VARS:
        values = getattr(epoch, name)
        for y in range(0, spec.ny, cy):
            for x in range(0, spec.nx, cx):
                tile = np.ascontiguousarray(values[y:y + cy, x:x + cx])
                if not (np.isnan(tile).all() if name in FLOAT_VARS else not tile.any()):
                    stored.append((name in FLOAT_VARS, tile))
    floor = ours = float("inf")
    for _ in range(rounds):
        c = time.process_time()
        for quantized, tile in stored:
            zstd.encode(quantize.encode(tile) if quantized else tile)
        c1 = time.process_time()
        for name in CUBE_VARS:
            fill = np.float32(np.nan) if name in FLOAT_VARS else np.uint32(0)
            list(_map_shards(getattr(epoch, name), chunk, shard, fill, name in FLOAT_VARS))
        c2 = time.process_time()
        floor, ours = min(floor, c1 - c), min(ours, c2 - c1)
    print(f"one step's map shards, {len(stored)} stored inner chunks: codecs alone {1e3 * floor:.0f} ms, "
          f"as write_epoch encodes them {1e3 * ours:.0f} ms CPU")


def main() -> None:
    p = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("--points", type=int, default=1_500_000)
    p.add_argument("--nx", type=int, default=2523)
    p.add_argument("--ny", type=int, default=1468)
    p.add_argument("--scans", type=int, default=5)
    p.add_argument("--rounds", type=int, default=3)
    p.add_argument("--scanner", action="store_true", help="the demo scanner model's points and station grid")
    args = p.parse_args()
    if args.scanner:
        spec, x, y, z = scanner_points(args.points)
    else:
        spec = GridSpec(station="north", crs_wkt="EPSG:32633", x0=500000.0, y0=7650000.0, cell=0.5, nx=args.nx,
                        ny=args.ny)
        x, y, z = scan_points(spec, args.points, 1)
    epoch = binning(spec, x, y, z, args.rounds)
    codec_floor(spec, epoch, args.rounds)
    steps(spec, epoch, args.scans, args.rounds, f"{spec.nx} x {spec.ny} cells")
    small = GridSpec(station="north", crs_wkt="EPSG:32633", x0=500000.0, y0=7650000.0, cell=0.5, nx=64, ny=64)
    tiny = EpochGrid(np.full((64, 64), 5.0, np.float32), np.zeros((64, 64), np.float32), np.ones((64, 64), np.uint32), 0)
    steps(small, tiny, max(args.scans, 11), args.rounds, "64 x 64 cells (the fixed part)")


if __name__ == "__main__":
    main()
