"""The survey's checksum comes from the inspection's own reads: it must equal a plain SHA-256."""

from __future__ import annotations

import hashlib
from pathlib import Path

import fsspec
import laspy
import laspy.vlrs.vlrlist
import numpy as np
import pytest

from archive.sitefile import SiteFile
from archive.survey import inspect_file


def _las(path: Path, n: int, compressed: bool, evlr: bool) -> None:
    header = laspy.LasHeader(point_format=6, version="1.4")
    header.scales = np.array([0.001] * 3)
    header.offsets = np.array([500000.0, 7650000.0, 0.0])
    rng = np.random.default_rng(5)
    las = laspy.LasData(header)
    las.X = rng.integers(0, 10**6, n)
    las.Y = rng.integers(0, 10**6, n)
    las.Z = rng.integers(0, 10**4, n)
    las.gps_time = 1.4e9 + np.arange(n) * 1e-5
    if evlr:  # an extended record after the points: readers seek to it before they read points
        las.evlrs = laspy.vlrs.vlrlist.VLRList([laspy.VLR("scanshelf-test", 7, "after the points", b"x" * 70_000)])
    las.write(str(path), do_compress=compressed)


@pytest.mark.parametrize(
    "name, make",
    [
        ("north_20260901_060000.las", lambda p: _las(p, 300_000, False, True)),
        ("north_20260902_060000.laz", lambda p: _las(p, 50_000, True, False)),
        ("north_20260903_060000.xyz", lambda p: p.write_text("".join(f"{i}.5 {i}.25 1.0\n" for i in range(5000)))),
        ("notes.bin", lambda p: p.write_bytes(np.random.default_rng(1).bytes(3_000_000))),
    ],
)
def test_checksum_equals_sha256_of_the_file(tmp_path, name, make) -> None:
    station = tmp_path / "north"
    station.mkdir()
    path = station / name
    make(path)
    fs = fsspec.filesystem("file")
    report = inspect_file(fs, str(path), f"north/{name}", path.stat().st_size, SiteFile(crs="EPSG:32633"))
    # reference: hashlib over the file's bytes, read plainly
    assert report.sha256 == hashlib.sha256(path.read_bytes()).hexdigest()
    if name.endswith((".las", ".laz")):
        assert report.point_count == laspy.read(str(path)).header.point_count  # reference: laspy
