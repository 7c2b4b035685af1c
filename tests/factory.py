"""Small hand-made sources for tests: a few LAS/LAZ/ASCII files with known content."""

from __future__ import annotations

from datetime import datetime, timezone
from pathlib import Path

import laspy
import numpy as np
import pyproj


SITE_CRS = "EPSG:32633"
X0, Y0 = 500_000.0, 7_650_000.0


def adjusted_gps(when: datetime) -> float:
    """UTC → LAS adjusted standard GPS time (GPS seconds - 1e9), from astropy, not from the project.

    reference: astropy.time (its own leap-second table, shipped with astropy-iers-data)
    """
    from astropy.time import Time
    from astropy.utils import iers

    iers.conf.auto_download = False
    naive = when.astimezone(timezone.utc).replace(tzinfo=None)
    return round(float(Time(naive.isoformat(), scale="utc").gps) - 1e9, 6)


def scan_points(n: int, seed: int = 0) -> dict[str, np.ndarray]:
    """A fan of points in front of a station, in sweep order."""
    rng = np.random.default_rng(seed)
    az = np.repeat(np.linspace(-0.6, 0.6, max(1, n // 200)), 200)[:n]
    az = np.concatenate([az, np.full(n - az.size, 0.6)])
    r = 20 + 180 * rng.random(n) ** 0.5
    return {
        "x": X0 + 100 + r * np.sin(az),
        "y": Y0 + 100 + r * np.cos(az),
        "z": 50 - 0.1 * r + rng.normal(0, 0.05, n),
        "intensity": (60000 / (1 + r / 50)).astype(np.uint16),
    }


def write_las(path: Path, n: int, when: datetime, *, version: str = "1.4", point_format: int = 6,
              seed: int = 0, crs: str | None = SITE_CRS, extra: bool = True) -> laspy.LasData:
    """A LAS/LAZ file (by suffix) with absolute GPS time for 1.4, week time for 1.2."""
    header = laspy.LasHeader(point_format=point_format, version=version)
    header.scales = np.array([0.001, 0.001, 0.001])
    header.offsets = np.array([X0, Y0, 0.0])
    if version == "1.4":
        header.global_encoding.gps_time_type = laspy.header.GpsTimeType.STANDARD
    if extra:
        header.add_extra_dim(laspy.ExtraBytesParams(name="deviation", type=np.float32))
    if crs:
        header.add_crs(pyproj.CRS(crs))
    las = laspy.LasData(header)
    p = scan_points(n, seed)
    las.x, las.y, las.z = p["x"], p["y"], p["z"]
    las.intensity = p["intensity"]
    las.return_number = np.ones(n, np.uint8)
    las.number_of_returns = np.ones(n, np.uint8)
    las.classification = np.where(p["z"] > 40, 2, 1).astype(np.uint8)
    t0 = adjusted_gps(when) if version == "1.4" else 3 * 86400.0
    las.gps_time = t0 + np.arange(n) * 1e-4
    if extra:
        las.deviation = np.random.default_rng(seed).random(n).astype(np.float32)
    path.parent.mkdir(parents=True, exist_ok=True)
    las.write(str(path))
    return las


def write_csv(path: Path, n: int, seed: int = 0, delimiter: str = ",", bad_rows: int = 0) -> dict[str, np.ndarray]:
    p = scan_points(n, seed)
    path.parent.mkdir(parents=True, exist_ok=True)
    sep = delimiter
    with open(path, "w") as fh:
        fh.write(sep.join(["X", "Y", "Z", "Intensity"]) + "\n")
        for i in range(n):
            fh.write(f"{p['x'][i]:.3f}{sep}{p['y'][i]:.3f}{sep}{p['z'][i]:.3f}{sep}{p['intensity'][i]}\n")
        for i in range(bad_rows):
            fh.write(["nan,1,2,3\n", "1,2\n", "abc,1,2,3\n"][i % 3].replace(",", sep))
    return p


def utc(*args: int) -> datetime:
    return datetime(*args, tzinfo=timezone.utc)


def small_source(root: Path) -> dict[str, int]:
    """Two stations, all formats, plus the classic faults; returns expected good points per file."""
    expected = {}
    write_las(root / "north/2026/09/scan_a.las", 40_000, utc(2026, 9, 1, 6), seed=1)
    expected["north/2026/09/scan_a.las"] = 40_000
    write_las(root / "north/2026/09/scan_b.laz", 30_000, utc(2026, 9, 1, 12), seed=2, point_format=7)
    expected["north/2026/09/scan_b.laz"] = 30_000
    write_las(root / "south/raw/S_20260901_180000.las", 25_000, utc(2026, 9, 1, 18), version="1.2",
              point_format=1, seed=3, extra=False)
    expected["south/raw/S_20260901_180000.las"] = 25_000
    write_csv(root / "south/exports/exp 20260902T060000.csv", 5_000, seed=4)
    expected["south/exports/exp 20260902T060000.csv"] = 5_000
    # faults
    data = (root / "north/2026/09/scan_a.las").read_bytes()
    (root / "north/copy of scan_a.las").write_bytes(data)  # byte-identical duplicate
    write_las(root / "north/2026/09/trunc.las", 10_000, utc(2026, 9, 2, 6), seed=5)
    t = (root / "north/2026/09/trunc.las").read_bytes()
    (root / "north/2026/09/trunc.las").write_bytes(t[: len(t) - 34 * 1000 - 7])  # cut mid-record
    write_csv(root / "south/exports/bad 20260903T060000.csv", 2_000, seed=6, bad_rows=3)
    write_las(root / "north/nocrs_20260904_060000.las", 1_000, utc(2026, 9, 4, 6), seed=7, crs=None)
    (root / "notes.txt").write_text("field notes, not data\n")
    return expected
