"""Benchmark of the points engine: Hilbert key + sort + gather + Parquet write.

Generates scan-like points (sweep order: azimuth columns of elevation profiles, range-dependent
spacing and intensity, increasing gps_time, a few multiple returns and classes) and prints:
  * engine speed (points/s), bytes/point and peak RSS of `write_scan`;
  * the same points written plainly by pyarrow (defaults) and as LAZ (laspy + lazrs, format 6);
  * a table of encoding / order variants on the same points.

Usage:
  python benchmarks/points.py                      # 20M points, all comparisons
  python benchmarks/points.py --points 100000000 --budget 512 --only-engine --stream
      # bounded-memory check: chunks are generated on the fly, peak RSS is reported
"""

from __future__ import annotations

import argparse
import os
import resource
import sys
import tempfile
import time
from collections.abc import Iterator
from dataclasses import replace

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

sys.path.insert(0, os.path.join(os.path.dirname(__file__), ".."))

from archive.points.coords import decimal_from_units  # noqa: E402
from archive.points.hilbert import SiteGrid  # noqa: E402
from archive.points.write import Encoding, write_scan  # noqa: E402

ORIGIN = (512_345.678, 5_401_234.567, 402.3)  # fictional scanner position (metres, projected CRS)
OFFSET = (512_000.0, 5_401_000.0, 0.0)  # LAS offsets; scale 0.001 on every axis
PROFILE = 2500  # points per azimuth column
CHUNK = 1_000_000


def scan_arrays(start: int, count: int, total: int, seed: int = 7) -> dict[str, np.ndarray]:
    """Points [start, start+count) of a `total`-point synthetic scan, as LAS-style integers."""
    rng = np.random.default_rng((seed, start))
    i = np.arange(start, start + count)
    columns = max(1, total // PROFILE)
    az = 2 * np.pi * (i // PROFILE) / columns
    el = np.deg2rad(-70 + 100 * (i % PROFILE) / PROFILE)
    height = 1.8
    cliff = 60 + 25 * np.sin(3 * az) + 5 * np.cos(7 * az)  # distance of a rock face
    ground = np.where(el < -0.001, height / np.sin(np.clip(-el, 1e-3, None)), np.inf)
    r = np.minimum(ground, cliff / np.maximum(np.cos(el), 0.05))
    r = np.minimum(r, 300.0)
    r = r * (1 + 0.002 * np.sin(40 * az) * np.cos(25 * el)) + rng.normal(0, 0.003, count)
    horizontal = r * np.cos(el)
    x = ORIGIN[0] + horizontal * np.cos(az)
    y = ORIGIN[1] + horizontal * np.sin(az)
    z = ORIGIN[2] + r * np.sin(el) + 0.4 * np.sin(x / 7.0) * np.cos(y / 11.0)
    returns = np.where(rng.random(count) < 0.05, 2, 1).astype(np.uint8)
    return_number = np.where((returns == 2) & (rng.random(count) < 0.5), 2, 1).astype(np.uint8)
    cls = np.where(r < cliff * 0.98, 2, 1).astype(np.uint8)
    cls[rng.random(count) < 0.03] = 5
    intensity = np.clip(40000 * np.exp(-r / 150) * (0.85 + 0.15 * rng.random(count)), 0, 65535)
    return {
        "X": np.rint((x - OFFSET[0]) / 0.001).astype(np.int64),
        "Y": np.rint((y - OFFSET[1]) / 0.001).astype(np.int64),
        "Z": np.rint((z - OFFSET[2]) / 0.001).astype(np.int64),
        "intensity": intensity.astype(np.uint16),
        "return_number": return_number,
        "number_of_returns": returns,
        "classification": cls,
        "gps_time": 1.3e9 + i * 2e-6,
    }


def to_table(a: dict[str, np.ndarray]) -> pa.Table:
    """LAS-style integers → the shelf's points table (exact decimals at 3 places)."""
    cols = {
        axis: decimal_from_units(a[axis.upper()] + int(OFFSET[k] * 1000), 3) for k, axis in enumerate("xyz")
    }
    for name in ("intensity", "return_number", "number_of_returns", "classification", "gps_time"):
        cols[name] = pa.array(a[name])
    return pa.table(cols)


def chunks(total: int) -> Iterator[pa.Table]:
    for start in range(0, total, CHUNK):
        yield to_table(scan_arrays(start, min(CHUNK, total - start), total))


def peak_rss_mib() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024


def site_grid() -> SiteGrid:
    return SiteGrid.from_bounds(ORIGIN[0] - 400, ORIGIN[1] - 400, ORIGIN[0] + 400, ORIGIN[1] + 400)


def run_engine(source, n: int, path: str, budget: int, **kw) -> tuple[float, float, int]:
    """Wall time, CPU time of this process (the per-core figure; robust on a shared machine), bytes."""
    t, c = time.perf_counter(), time.process_time()
    w = write_scan(source, path, site_grid(), metadata={"scanshelf": {"scan_id": "bench"}}, memory_budget=budget, **kw)
    wall, cpu = time.perf_counter() - t, time.process_time() - c
    assert w.rows == n
    return wall, cpu, w.size


def laz_size(n: int, path: str) -> tuple[float, int]:
    import laspy

    header = laspy.LasHeader(point_format=6, version="1.4")
    header.scales = np.array([0.001, 0.001, 0.001])
    header.offsets = np.array(OFFSET)
    t = time.perf_counter()  # wall: lazrs parallel uses several threads
    with laspy.open(path, mode="w", header=header, laz_backend=laspy.LazBackend.LazrsParallel) as out:
        for start in range(0, n, CHUNK):
            a = scan_arrays(start, min(CHUNK, n - start), n)
            rec = laspy.ScaleAwarePointRecord.zeros(len(a["X"]), header=header)
            for name in ("X", "Y", "Z", "intensity", "return_number", "number_of_returns", "classification", "gps_time"):
                rec[name] = a[name]
            out.write_points(rec)
    return time.perf_counter() - t, os.path.getsize(path)


def main() -> None:
    p = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("--points", type=int, default=20_000_000)
    p.add_argument("--budget", type=int, default=4096, help="memory budget in MiB (default 4096: in memory)")
    p.add_argument("--variant-points", type=int, default=5_000_000, help="points for the variants table")
    p.add_argument("--only-engine", action="store_true", help="skip the comparisons")
    p.add_argument("--stream", action="store_true", help="generate chunks on the fly (for large --points)")
    p.add_argument("--dir", default=None, help="where to write (default: a temp folder)")
    args = p.parse_args()
    n, budget = args.points, args.budget * 2**20
    out = tempfile.mkdtemp(dir=args.dir)
    print(f"points: {n:,}   budget: {args.budget} MiB   cores used: 1   out: {out}")

    if args.stream:
        t, c = time.perf_counter(), time.process_time()
        for _ in chunks(n):
            pass
        gen, gen_cpu = time.perf_counter() - t, time.process_time() - c
        rss0 = peak_rss_mib()
        wall, cpu, size = run_engine(chunks(n), n, f"{out}/engine.parquet", budget)
        wall, cpu = wall - gen, cpu - gen_cpu
        print(f"generation alone: {gen:.1f} s wall; engine figures below exclude it")
    else:
        data = list(chunks(n))
        rss0 = peak_rss_mib()
        wall, cpu, size = run_engine(iter(data), n, f"{out}/engine.parquet", budget)
    print(f"engine: {n / cpu / 1e6:.2f} M points/s per CPU-second ({n / wall / 1e6:.2f} M/s wall)   "
          f"{size / n:.2f} bytes/point   peak RSS {peak_rss_mib():.0f} MiB (before the engine: {rss0:.0f} MiB)   "
          f"load average {os.getloadavg()[0]:.1f} on {os.cpu_count()} cores")
    if args.only_engine:
        return

    from archive.points.coords import units_of
    from archive.points.sort import sorted_row_groups

    grid = site_grid()
    ux = np.concatenate([units_of(c["x"]) for c in data])
    uy = np.concatenate([units_of(c["y"]) for c in data])
    c = time.process_time()
    grid.keys_of_units(ux, uy, 3)
    keys_time = time.process_time() - c
    del ux, uy
    c = time.process_time()
    for _ in sorted_row_groups(iter(data), grid, memory_budget=budget):
        pass
    sort_time = time.process_time() - c
    print(f"breakdown (CPU): Hilbert keys {n / keys_time / 1e6:.1f} M/s; key + group + gather {n / sort_time / 1e6:.2f} M/s "
          f"({sort_time:.1f} s); Parquet encode + write + stats ~{cpu - sort_time:.1f} s")

    table = pa.concat_tables(data)
    c = time.process_time()
    pq.write_table(table, f"{out}/plain.parquet")
    plain = time.process_time() - c
    plain_size = os.path.getsize(f"{out}/plain.parquet")
    lt, lsize = laz_size(n, f"{out}/scan.laz")
    print(f"pyarrow defaults, scan order, no sort: {n / plain / 1e6:.2f} M points/s per CPU-second   "
          f"{plain_size / n:.2f} bytes/point")
    print(f"LAZ (laspy+lazrs parallel, format 6): {n / lt / 1e6:.2f} M points/s wall   {lsize / n:.2f} bytes/point")
    print(f"engine / LAZ size: {size / lsize:.2f}x   engine / pyarrow size: {size / plain_size:.2f}x   "
          f"engine speed / pyarrow-defaults speed: {plain / cpu:.2f}")

    m = min(args.variant_points, n)
    sub = [c for c in data[: -(-m // CHUNK)]]
    m = sum(len(c) for c in sub)
    base = Encoding()
    variants = [
        ("default: zstd-1, DELTA ints, BSS floats, dict 8-bit, scan order in group", {}),
        ("zstd-2", {"encoding": replace(base, compression_level=2)}),
        ("zstd-3", {"encoding": replace(base, compression_level=3)}),
        ("hilbert order inside group", {"scan_order": False}),
        ("no dictionary on 8-bit enums", {"encoding": replace(base, dictionary_enums=False)}),
        ("PLAIN other integers", {"encoding": replace(base, integers=None)}),
        ("BSS on other integers", {"encoding": replace(base, integers="BYTE_STREAM_SPLIT")}),
        ("PLAIN floats", {"encoding": replace(base, floats="PLAIN")}),
        ("lz4 instead of zstd", {"encoding": replace(base, compression="lz4", compression_level=None)}),
        ("row groups 128k", {"row_group_size": 131_072}),
        ("row groups 512k", {"row_group_size": 524_288}),
        ("row groups 1M", {"row_group_size": 1_048_576}),
    ]
    print(f"\nvariants on {m:,} points (best of 3 rounds, run round-robin; CPU time)")
    print("| variant | M points/s per CPU-s | bytes/point | vs LAZ |\n|---|---|---|---|")
    best: dict[str, float] = {}
    sizes: dict[str, int] = {}
    for _ in range(3):
        for name, kw in variants:
            _, cpu, sizes[name] = run_engine(iter(sub), m, f"{out}/variant.parquet", budget, **kw)
            best[name] = min(best.get(name, np.inf), cpu)
    for name, _ in variants:
        print(f"| {name} | {m / best[name] / 1e6:.2f} | {sizes[name] / m:.2f} | {sizes[name] / m / (lsize / n):.2f} |")


if __name__ == "__main__":
    main()
