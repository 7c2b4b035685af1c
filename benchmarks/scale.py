"""Scale-out benchmark: migrate a synthetic source of 500M+ points with 1 and 2 dask workers.

The source is generated on the fly (never stored in the repository): scans of uncompressed
LAS 1.4, point format 6, laid out the way a fixed scanner records them (azimuth columns,
elevation rows, range growing with depression angle). Prints throughput with 1 and 2
workers, the scaling ratio, peak RSS per worker process (sampled every 0.2 s), the CPU cores
the whole process tree kept busy on average (a single worker is not a single core: Arrow's
thread pool and the coordinating process run beside it), time per billion points, and the same
for one single 200M-point scan.

    python benchmarks/scale.py [--points 500000000] [--scans 50] [--single 200000000] [--workers 1,2]
                               [--workdir DIR]

Targets: 2 workers ≥ 1.7× one worker; peak RSS per worker ≤ 1.5 GiB at any scan size;
total ≥ 6M points/s on 2 cores from uncompressed LAS.
"""

from __future__ import annotations

import argparse
import shutil
import tempfile
import threading
import time
from datetime import datetime, timedelta, timezone
from pathlib import Path

import laspy
import numpy as np
import psutil

from archive.timeutil import utc_to_adjusted_gps

CHUNK = 4_000_000


def write_scan(path: Path, n: int, when: datetime, seed: int) -> None:
    """One sweep-ordered scan, written chunk by chunk straight from numpy into laspy's writer."""
    header = laspy.LasHeader(point_format=6, version="1.4")
    header.scales = np.array([0.001, 0.001, 0.001])
    header.offsets = np.array([500_000.0, 7_650_000.0, 0.0])
    header.global_encoding.gps_time_type = laspy.header.GpsTimeType.STANDARD
    import pyproj

    header.add_crs(pyproj.CRS("EPSG:32633"))
    rng = np.random.default_rng(seed)
    rows = 2000
    t0 = utc_to_adjusted_gps(when)
    path.parent.mkdir(parents=True, exist_ok=True)
    with laspy.open(str(path), mode="w", header=header) as out:
        done = 0
        while done < n:
            m = min(CHUNK, n - done)
            i = np.arange(done, done + m)
            az = (i // rows) / max(1, n // rows) * 1.2 - 0.6
            el = -0.02 - 0.25 * (i % rows) / rows
            rng_m = np.minimum(40.0 / -np.sin(el), 2000.0) + rng.normal(0, 0.02, m)
            rec = laspy.ScaleAwarePointRecord.zeros(m, header=header)
            rec.x = 500_500 + rng_m * np.sin(az)
            rec.y = 7_650_100 + rng_m * np.cos(az)
            rec.z = 40 + rng_m * np.sin(el) + 0.5 * np.sin(rng_m / 30)
            rec.intensity = (50_000 / (1 + rng_m / 100)).astype(np.uint16)
            rec.return_number = np.ones(m, np.uint8)
            rec.number_of_returns = np.ones(m, np.uint8)
            rec.classification = np.full(m, 2, np.uint8)
            rec.gps_time = t0 + i * 2e-6
            out.write_points(rec)
            done += m


def make_source(root: Path, points: int, scans: int) -> None:
    per = points // scans
    start = datetime(2026, 9, 1, tzinfo=timezone.utc)
    for k in range(scans):
        when = start + timedelta(hours=6 * k)
        write_scan(root / "north" / f"scan_{when:%Y%m%d_%H%M%S}.las", per, when, k)


class RssSampler(threading.Thread):
    """Peak RSS of every process below this one, and their CPU time, sampled every 0.2 s."""

    def __init__(self) -> None:
        super().__init__(daemon=True)
        self.peaks: dict[int, int] = {}
        self.cpu: dict[int, float] = {}  # last seen user + system seconds per process
        self._done = threading.Event()

    def run(self) -> None:
        me = psutil.Process()
        while not self._done.is_set():
            for p in me.children(recursive=True):
                try:
                    with p.oneshot():
                        rss, times = p.memory_info().rss, p.cpu_times()
                    self.peaks[p.pid] = max(self.peaks.get(p.pid, 0), rss)
                    self.cpu[p.pid] = times.user + times.system
                except psutil.Error:
                    pass
            time.sleep(0.2)

    def stop(self) -> int:
        self._done.set()
        self.join()
        return max(self.peaks.values(), default=0)

    def child_cpu_seconds(self) -> float:
        return sum(self.cpu.values())


def run(source: Path, shelf: Path, workers: int) -> tuple[float, int, int, float]:
    """(wall seconds, points, peak RSS of a worker, CPU cores busy on average over the run)."""
    from archive.migrate import migrate

    shutil.rmtree(shelf, ignore_errors=True)
    sampler = RssSampler()
    sampler.start()
    me = psutil.Process()
    cpu0 = sum(me.cpu_times()[:2])
    t0 = time.perf_counter()
    result = migrate(str(source), str(shelf), workers=workers, previews=False, memory_per_worker=int(1.5 * 2**30))
    wall = time.perf_counter() - t0
    peak = sampler.stop()
    cores = (sum(me.cpu_times()[:2]) - cpu0 + sampler.child_cpu_seconds()) / wall
    assert not result.failed, result.failed
    return wall, result.points, peak, cores


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--points", type=int, default=500_000_000)
    parser.add_argument("--scans", type=int, default=50)
    parser.add_argument("--single", type=int, default=200_000_000, help="points of the single-scan run (0: skip)")
    parser.add_argument("--workers", default="1,2", help="worker counts to run, comma-separated")
    parser.add_argument("--workdir", default=str(Path(tempfile.gettempdir()) / "scanshelf-bench-scale"),
                        help="emptied and reused (default: scanshelf-bench-scale in the system temp folder)")
    args = parser.parse_args()
    work = Path(args.workdir)
    shutil.rmtree(work, ignore_errors=True)

    t0 = time.perf_counter()
    make_source(work / "source", args.points, args.scans)
    print(f"generated {args.points:,} points in {args.scans} LAS scans in {time.perf_counter() - t0:.0f} s", flush=True)
    header = (f"{'run':28s} {'points':>13s} {'wall s':>8s} {'Mpts/s':>8s} {'s per 1e9':>10s} "
              f"{'peak RSS/worker MiB':>20s} {'cores busy':>11s}")
    print(header, flush=True)
    rows = []

    def record(name: str, workers: int, wall: float, n: int, peak: int, cores: float) -> None:
        # one line as soon as a run ends: a long benchmark cut short still leaves its figures
        rows.append((name, workers, wall, n, peak))
        print(f"{name:28s} {n:>13,} {wall:>8.1f} {n / wall / 1e6:>8.2f} {wall * 1e9 / n:>10.0f} "
              f"{peak / 2**20:>20.0f} {cores:>11.2f}", flush=True)

    for workers in (int(w) for w in args.workers.split(",")):
        record(f"{args.scans} scans, {workers} worker(s)", workers, *run(work / "source", work / "shelf", workers))
    if args.single:
        shutil.rmtree(work / "source", ignore_errors=True)
        write_scan(work / "single" / "north" / "scan_20260901_060000.las", args.single,
                   datetime(2026, 9, 1, 6, tzinfo=timezone.utc), 99)
        record("one scan, 1 worker", 1, *run(work / "single", work / "shelf", 1))
    by_workers = {r[1]: r for r in rows if "scans" in r[0]}
    if 1 in by_workers and 2 in by_workers:
        print(f"\nscaling 2 workers / 1 worker: {by_workers[1][2] / by_workers[2][2]:.2f}x   (target ≥ 1.7x)")
        print(f"total throughput with 2 workers: {by_workers[2][3] / by_workers[2][2] / 1e6:.2f}M points/s   "
              "(target ≥ 6M/s)")
    print("peak RSS per worker target: ≤ 1536 MiB")
    shutil.rmtree(work, ignore_errors=True)


if __name__ == "__main__":
    main()
