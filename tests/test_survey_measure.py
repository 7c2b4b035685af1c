"""The survey's deep inspection (one pass over the points, hashed on the way) gives the count,
bounds, time range and checksum an independent reader gives, whatever the chunking."""

from __future__ import annotations

import errno
import hashlib
from pathlib import Path

import fsspec
import laspy
import laspy.vlrs.vlrlist
import numpy as np
import pytest

import archive.sources.las as las_module
from archive.sitefile import SiteFile
from archive.sources import open_points
from archive.survey import inspect_file

N = 250_003  # 7.5 MB of 30-byte records: four reads of the default 2 MiB buffer, the last one partial
SMALL_BUFFER = 64 << 10  # 2184 records: 115 reads, each below the survey's 256 KiB read buffer


KEPT = 180_001  # whole records left in the truncated file
# where each field's extremes sit: the first and last record, the first record of a second read
# (2184 records in SMALL_BUFFER, 69905 in the default), the last of a first read, the last kept
EXTREMES = {
    "X": (0, N - 1),
    "Y": (2184, 69_905),
    "Z": (KEPT - 1, 2183),
    "gps_time": (69_905, KEPT - 1),
}


def _write(path: Path, n: int, *, evlr: bool, compressed: bool = False) -> None:
    """Random points with every field's extremes at the places a chunked reader gets wrong."""
    header = laspy.LasHeader(point_format=6, version="1.4")
    header.scales = np.array([0.001, 0.001, 0.01])
    header.offsets = np.array([500000.0, 7650000.0, -20.0])
    header.global_encoding.gps_time_type = laspy.header.GpsTimeType.STANDARD
    rng = np.random.default_rng(11)
    las = laspy.LasData(header)
    las.X = rng.integers(-10**6, 10**6, n)
    las.Y = rng.integers(-10**6, 10**6, n)
    las.Z = rng.integers(-10**4, 10**4, n)
    las.gps_time = 1.4e9 + rng.random(n) * 3600.0
    limits = {"X": (-2**31, 2**31 - 1), "Y": (-(10**9), 10**9), "Z": (-5 * 10**5, 7 * 10**5), "gps_time": (1.3e9, 1.5e9)}
    for name, (low_at, high_at) in EXTREMES.items():
        values = np.array(las[name])
        values[low_at], values[high_at] = limits[name]
        if name == "gps_time":
            values[0] = np.nan  # skipped, as Arrow's min_max skips it
        las[name] = values
    if evlr:  # bytes after the points: the checksum must cover them too
        las.evlrs = laspy.vlrs.vlrlist.VLRList([laspy.VLR("scanshelf-test", 7, "after the points", b"e" * 5_000)])
    las.write(str(path), do_compress=compressed)


def _inspect(path: Path):
    fs = fsspec.filesystem("file")
    relpath = f"north/{path.name}"
    report = inspect_file(fs, str(path), relpath, path.stat().st_size, SiteFile(crs="EPSG:32633"))
    reader = open_points(fs, str(path), relpath, path.stat().st_size, path.read_bytes()[:4096], SiteFile())
    bounds = reader.measure()
    return report, reader, bounds


def _expect(report, reader, bounds, points: laspy.LasData, data: bytes) -> None:
    # reference: hashlib over the file's bytes, read plainly
    assert report.sha256 == hashlib.sha256(data).hexdigest()
    # reference: laspy 2.x's scaled coordinates of the points themselves (not the header's bounds)
    expected = tuple(float(v) for v in (points.x.min(), points.y.min(), points.z.min(),
                                        points.x.max(), points.y.max(), points.z.max()))
    assert report.point_count == reader.tally.points == len(points.x)
    assert report.bounds == pytest.approx(expected, rel=1e-15, abs=0)
    assert bounds == pytest.approx(expected, rel=1e-15, abs=0)
    # reference: numpy nanmin/nanmax over laspy's gps_time
    times = np.asarray(points.gps_time)
    assert (reader.tally.min_time, reader.tally.max_time) == (np.nanmin(times), np.nanmax(times))


@pytest.mark.parametrize("buffer_bytes", [las_module.MEASURE_BYTES, SMALL_BUFFER])
def test_inspection_equals_laspy_and_sha256(tmp_path, monkeypatch, buffer_bytes) -> None:
    monkeypatch.setattr(las_module, "MEASURE_BYTES", buffer_bytes)
    path = tmp_path / "north" / "north_20260901_060000.las"
    path.parent.mkdir()
    _write(path, N, evlr=True)
    assert N % (buffer_bytes // 30) != 0 and N > 3 * (buffer_bytes // 30)  # several reads, the last partial
    report, reader, bounds = _inspect(path)
    assert report.status == "ok", report.problems
    _expect(report, reader, bounds, laspy.read(str(path)), path.read_bytes())


def test_compressed_inspection_equals_laspy_and_sha256(tmp_path) -> None:
    path = tmp_path / "north" / "north_20260901_060000.laz"
    path.parent.mkdir()
    _write(path, N, evlr=False, compressed=True)
    report, reader, bounds = _inspect(path)
    assert report.status == "ok", report.problems
    _expect(report, reader, bounds, laspy.read(str(path)), path.read_bytes())


@pytest.mark.parametrize("buffer_bytes", [las_module.MEASURE_BYTES, SMALL_BUFFER])
def test_truncated_inspection_salvages_the_whole_records(tmp_path, monkeypatch, buffer_bytes) -> None:
    monkeypatch.setattr(las_module, "MEASURE_BYTES", buffer_bytes)
    whole = tmp_path / "whole.las"
    _write(whole, N, evlr=False)
    original = laspy.read(str(whole))
    data = whole.read_bytes()
    offset, size = original.header.offset_to_point_data, original.header.point_format.size
    kept = KEPT  # whole records, then half a record
    cut = data[: offset + kept * size + size // 2]
    path = tmp_path / "north" / "north_20260901_060000.las"
    path.parent.mkdir()
    path.write_bytes(cut)
    report, reader, bounds = _inspect(path)
    assert report.status == "damaged"
    # reference: ASPRS LAS 1.4 layout, fixed-size records from offset_to_point_data
    assert (len(cut) - offset) // size == kept
    assert report.problems == [f"header declares {N} points but the file holds {kept} (truncated, or a header count too large)"]
    # the kept points' references come from laspy's read of the whole file, first `kept` points
    _expect(report, reader, bounds, original[:kept], cut)


def test_conversion_chunks_stay_valid_after_a_measure(tmp_path) -> None:
    """The sort holds every chunk ``rows()`` gives; only ``measure`` may reuse its buffer."""
    path = tmp_path / "north" / "north_20260901_060000.las"
    path.parent.mkdir()
    _write(path, N, evlr=False)
    _, reader, _ = _inspect(path)
    held = list(reader.rows(chunk_size=70_000, salvage=True).chunks)
    assert [len(c) for c in held] == [70_000, 70_000, 70_000, 40_003]
    assert not any(np.shares_memory(a, b) for i, a in enumerate(held) for b in held[i + 1:])
    # reference: laspy 2.x's integer records of the same file
    reference = laspy.read(str(path))
    for name in ("X", "Y", "Z", "gps_time"):
        np.testing.assert_array_equal(np.concatenate([c[name] for c in held]), np.asarray(reference.points.array[name]))


@pytest.mark.parametrize("where", ["local", "memory", "unmappable"])
def test_conversion_chunks_of_a_truncated_file_equal_laspy(tmp_path, monkeypatch, where) -> None:
    """Local files are mapped, other file systems read, and so are local files that a file system
    refuses to map after the first chunk; all give the whole records, and chunks that start
    anywhere in a page (the point data offset is not page-aligned)."""
    whole = tmp_path / "whole.las"
    _write(whole, N, evlr=False)
    original = laspy.read(str(whole))
    data = whole.read_bytes()
    offset, size = original.header.offset_to_point_data, original.header.point_format.size
    assert offset % 4096 and (offset + 70_001 * size) % 4096  # chunks begin inside pages
    cut = data[: offset + KEPT * size + size // 2]
    if where == "memory":
        fs, path = fsspec.filesystem("memory"), f"/scanshelf-test-{tmp_path.name}/north_20260901_060000.las"
        fs.pipe(path, cut)
    else:
        fs, path = fsspec.filesystem("file"), str(tmp_path / "north_20260901_060000.las")
        Path(path).write_bytes(cut)
    if where == "unmappable":  # the first chunk maps; then the mount says it cannot (ENODEV)
        calls = iter([las_module._mapped_records])

        def once(*args):
            step = next(calls, None)
            if step is None:
                raise OSError(errno.ENODEV, "No such device")
            return step(*args)

        monkeypatch.setattr(las_module, "_mapped_records", once)
    try:
        reader = open_points(fs, path, "north/north_20260901_060000.las", len(cut), cut[:4096], SiteFile())
        held = list(reader.rows(chunk_size=70_001, salvage=True).chunks)
    finally:
        if where == "memory":
            fs.rm(path)
    assert [len(c) for c in held] == [70_001, 70_001, KEPT - 140_002]
    # mapped pages are read-only
    assert [c.flags.writeable for c in held] == {"local": [False] * 3, "memory": [True] * 3, "unmappable": [False, True, True]}[where]
    # reference: laspy 2.x's integer records of the whole file, the first KEPT of them
    expected = original.points.array[:KEPT]
    for name in expected.dtype.names:
        np.testing.assert_array_equal(np.concatenate([c[name] for c in held]), expected[name])
    assert reader.tally.problems == [f"header declares {N} points but the file holds {KEPT} (truncated, or a header count too large)"]


@pytest.mark.parametrize("n", [5, 4096, 65_536, 200_003])
def test_value_range_of_a_strided_field_equals_numpy(n) -> None:
    from archive.sources.base import IN_CACHE, RANGE_BLOCK, value_range

    # 37-byte records, as wide as LAS 1.4 point format 7 with an extra byte: the largest n spans
    # more than IN_CACHE, so its range is taken block by block
    records = np.zeros(n, dtype=[("X", "<i4"), ("flags", "u1"), ("gps_time", "<f8"), ("rest", "V24")])
    assert (200_003 * records.itemsize > IN_CACHE) and (65_536 * records.itemsize <= IN_CACHE)
    rng = np.random.default_rng(5)
    records["X"] = rng.integers(-1000, 1000, n)
    records["gps_time"] = rng.random(n)
    # extremes at the first value, at the last value of the first block the copies are made in,
    # and at the last value (in the last, partial block); NaN times are to be skipped
    records["X"][0], records["gps_time"][0] = 2**31 - 1, np.nan
    if n > RANGE_BLOCK:
        records["X"][RANGE_BLOCK - 1], records["gps_time"][RANGE_BLOCK - 1] = -5000, -1.0
    records["X"][n - 1], records["gps_time"][n - 1] = -(2**31), 3.0
    x, times = records["X"], records["gps_time"]
    assert not x.flags.c_contiguous
    # reference: numpy's own reductions over a contiguous copy
    plain = np.array(x)
    assert tuple(int(v) for v in value_range(x)) == (int(plain.min()), int(plain.max()))
    copied = np.array(times)
    lo, hi = value_range(times, skip_nan=True)
    assert (float(lo), float(hi)) == (float(np.nanmin(copied)), float(np.nanmax(copied)))
    if n > RANGE_BLOCK:
        assert float(lo) == -1.0  # the first block's last value
