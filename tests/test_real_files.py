"""Real LAS/LAZ files written by other programs (tests/data/real, from the laspy 2.7.0 sdist on
PyPI; see its README): every file converts, every point and every dimension equal to laspy's."""

from __future__ import annotations

import shutil
from pathlib import Path

import laspy
import numpy as np
import pytest

import archive
from archive.migrate import migrate

REAL = Path(__file__).parent / "data" / "real"
FILES = sorted(p.relative_to(REAL).as_posix() for p in REAL.rglob("*.la[sz]"))
TIME_SOURCES = {  # what each file offers, best first (see archive.survey.TIME_SOURCES)
    "st01/2014-12-10/test1_4.las": "gps",
    "st02/20210602/1_4_w_evlr.laz": "gps",
    "st03/2025/04/29/append-bug.laz": "gps",
    "st04/2011-05-01/autzen.las": "gps_week",
    "st05/autzen_trim.laz": "gps_week_header",
    "st06/2015-02-22/extrabytes.las": "gps_week",
    "st07/file_with_both_wkt_and_geotiff_vlrs.las": "gps",  # bit 0 clear, adjusted times
    "st08/20180904/plane.laz": "gps_week",
    "st09/2019/01/01/simple.copc.laz": "gps_week",
    "st10/2020-02-16/simple1_1.las": "gps_week",
    "st11/simple1_3.las": "gps_week_header",
    "st12/unregistered_extra_bytes.las": "header_date",  # GPS times all zero
    "st13/vegetation_1_3.las": "gps_week_header",
}


@pytest.fixture(scope="module")
def real_shelf(tmp_path_factory):
    src = tmp_path_factory.mktemp("real") / "src"
    shutil.copytree(REAL, src, ignore=shutil.ignore_patterns("*.md", "*.txt"))
    shelf = tmp_path_factory.mktemp("real_shelf")
    result = migrate(str(src), str(shelf), crs="none", previews=False)  # files without a CRS: local frames
    return shelf, result


def test_every_real_file_converts(real_shelf):
    shelf, result = real_shelf
    assert len(FILES) == 13
    assert result.failed == [] and len(result.converted) == len(FILES), result.summary()


@pytest.mark.parametrize("relpath", FILES)
def test_real_file_equals_laspy_in_every_point_and_dimension(real_shelf, relpath):
    shelf, _ = real_shelf
    las = laspy.read(str(REAL / relpath))  # reference: laspy 2.x reading the original file
    scans = archive.open_shelf(str(shelf)).find()
    scan = next(s for s in scans if _source_of(s) == relpath)
    got = scans.shelf.find(station=scan.station, start=scan.start, end=scan.end).read_points()
    got = got.filter(np.asarray(got["scan_id"].to_numpy(zero_copy_only=False) == scan.id))
    want = {"x": np.asarray(las.x), "y": np.asarray(las.y), "z": np.asarray(las.z)}
    for name in las.point_format.dimension_names:
        if name in ("X", "Y", "Z"):
            continue
        values = np.asarray(las.points[name])
        if values.ndim > 1:
            want.update({f"{name}_{i}": values[:, i] for i in range(values.shape[1])})
        else:
            want[name] = values.astype(np.uint8) if values.dtype == np.bool_ else values
    assert set(got.column_names) - {"scan_id"} == set(want), relpath  # every dimension kept, nothing added
    have = {k: got[k].to_numpy() for k in want}
    names = sorted(want)
    order_have = np.lexsort([have[k] for k in names][::-1])
    order_want = np.lexsort([want[k] for k in names][::-1])
    for k in names:  # bit for bit; x, y, z as X*scale+offset (ASPRS LAS 1.4), as laspy computes them
        np.testing.assert_array_equal(have[k][order_have], want[k][order_want], err_msg=f"{relpath}: {k}")


def test_real_file_times_come_from_the_best_source(real_shelf):
    shelf, _ = real_shelf
    scans = archive.open_shelf(str(shelf)).find()
    got = {_source_of(s): _item(s)["properties"]["scanshelf:time_source"] for s in scans}
    assert got == TIME_SOURCES
    approximate = {_source_of(s) for s in scans if _item(s)["properties"]["scanshelf:time_approximate"]}
    assert approximate == {k for k, v in TIME_SOURCES.items() if v in ("gps_week_header", "header_date")}


def _item(scan) -> dict:
    import json

    return json.loads(scan.item_json)


def _source_of(scan) -> str:
    return _item(scan)["properties"]["scanshelf:source_path"]
