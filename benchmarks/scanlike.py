"""Scan-like synthetic points for the remote-read benchmarks: one station sweeping around itself.

Points arrive in scan order (vertical lines sweeping in azimuth), their density falls with range
evenly over a disc (so a window's share of the area is its share of the points), and x, y, z are LAS integers (scale 1 mm) turned into exact
decimals, so the Parquet files compare fairly with LAZ written from the same integers.
"""

from __future__ import annotations

from collections.abc import Iterator

import numpy as np
import pyarrow as pa

from archive.points.coords import AxisEncoding

LINE = 500  # points per vertical scan line
SCALE = 0.001


def axes(centre: tuple[float, float]) -> dict[str, AxisEncoding]:
    return {a: AxisEncoding.for_las(SCALE, o) for a, o in zip("xyz", (round(centre[0]), round(centre[1]), 0.0))}


def chunks(
    n: int, centre: tuple[float, float], radius: float, seed: int, t0: float = 1.4e9, chunk: int = 2_000_000,
) -> Iterator[tuple[pa.Table, dict[str, np.ndarray]]]:
    """(table with decimal x, y, z, LAS integers of the chunk) in scan order, ``chunk`` rows at a time."""
    enc = axes(centre)
    lines = max(1, n // LINE)
    for start in range(0, n, chunk):
        rng = np.random.default_rng((seed, start))
        i = np.arange(start, min(n, start + chunk))
        m = i.size
        az = 2 * np.pi * (i // LINE) / lines
        r = 3 + (radius - 3) * np.sqrt((i % LINE) / LINE) + rng.normal(0, 0.01, m)  # even ground density
        x = centre[0] + r * np.cos(az)
        y = centre[1] + r * np.sin(az)
        z = 400 + 0.05 * r + 2 * np.sin(x / 15) * np.cos(y / 20) + rng.normal(0, 0.01, m)
        raw = {a: np.rint((v - enc[a].offset) / SCALE).astype(np.int32) for a, v in zip("xyz", (x, y, z))}
        returns = rng.choice(np.array([1, 1, 1, 1, 2], np.uint8), m)
        table = pa.table({
            "x": enc["x"].from_las(raw["x"]),
            "y": enc["y"].from_las(raw["y"]),
            "z": enc["z"].from_las(raw["z"]),
            "intensity": pa.array((20000 + 30000 * np.exp(-r / 40) + rng.normal(0, 500, m)).clip(0, 65535).astype(np.uint16)),
            "return_number": pa.array(np.minimum(returns, rng.integers(1, 3, m).astype(np.uint8))),
            "number_of_returns": pa.array(returns),
            "classification": pa.array(np.where(rng.random(m) < 0.8, 2, 1).astype(np.uint8)),
            "gps_time": pa.array(t0 + i * 2e-6),
        })
        raw["intensity"] = table["intensity"].to_numpy()
        raw["return_number"] = table["return_number"].to_numpy()
        raw["number_of_returns"] = returns
        raw["classification"] = table["classification"].to_numpy()
        raw["gps_time"] = table["gps_time"].to_numpy()
        yield table, raw


def write_laz(path: str, n: int, centre: tuple[float, float], radius: float, seed: int) -> int:
    """The same points as LAZ (point format 1, lazrs); returns the file's size in bytes."""
    import os

    import laspy

    header = laspy.LasHeader(point_format=1, version="1.2")
    header.scales = [SCALE] * 3
    header.offsets = [e.offset for e in axes(centre).values()]
    with laspy.open(path, mode="w", header=header, do_compress=True) as w:
        for _, raw in chunks(n, centre, radius, seed):
            rec = laspy.ScaleAwarePointRecord.zeros(raw["x"].size, header=header)
            rec.X, rec.Y, rec.Z = raw["x"], raw["y"], raw["z"]
            rec.intensity = raw["intensity"]
            rec.return_number = raw["return_number"]
            rec.number_of_returns = raw["number_of_returns"]
            rec.classification = raw["classification"]
            rec.gps_time = raw["gps_time"]
            w.write_points(rec)
    return os.path.getsize(path)
