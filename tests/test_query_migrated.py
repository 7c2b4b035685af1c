"""End to end: a shelf made by migrate, published to nginx, read back over HTTP."""

from __future__ import annotations

import laspy
import numpy as np
import xarray as xr

from archive import layout
from archive.publish import publish
from archive.query import open_shelf
from tests.servers import nginx  # noqa: F401 (fixture)


def test_migrated_shelf_over_http(small_shelf, small_source, nginx):
    shelf_root, _, _ = small_shelf
    source_root, _ = small_source
    publish(str(shelf_root), str(nginx.root / "migrated"))
    shelf = open_shelf(f"{nginx.url}/migrated")
    north = [s for s in shelf.find(station="north") if s.point_count == 40_000]
    assert len(north) == 1
    scan = north[0]
    xmin, ymin, _, xmax, ymax, _ = scan.bbox
    cx, cy = (xmin + xmax) / 2, (ymin + ymax) / 2
    box = (cx - 15, cy - 15, cx + 15, cy + 15)
    mine = shelf.find(bbox=box, station="north", start=scan.start, end=scan.end).read_points()
    mine = mine.filter(np.asarray(mine["scan_id"].to_pylist()) == scan.id)
    # reference: laspy reading the source LAS file the scan was migrated from
    las = laspy.read(source_root / "north/2026/09/scan_a.las")
    x, y = np.asarray(las.x), np.asarray(las.y)
    inside = (x >= box[0]) & (x <= box[2]) & (y >= box[1]) & (y <= box[3])
    assert inside.sum() > 100
    want = np.stack([x[inside], y[inside], np.asarray(las.z)[inside]])
    got = np.stack([mine[c].to_numpy() for c in "xyz"])
    want = want[:, np.lexsort(want[::-1])]
    got = got[:, np.lexsort(got[::-1])]
    np.testing.assert_array_equal(got, want)  # bit-identical floats, as a LAS reader computes them

    cube = shelf.grids("north")
    # reference: xarray.open_zarr over the same URL
    theirs = xr.open_zarr(f"{nginx.url}/migrated/{layout.grid_path('north')}", zarr_format=3, consolidated=True)
    np.testing.assert_array_equal(cube["elevation"].isel(time=0).values, theirs["elevation"].isel(time=0).values)
    assert np.isfinite(cube["elevation"].isel(time=0).values).any()


def test_extract_scans_with_different_fields(small_shelf, tmp_path):
    """Scans of point formats 6 and 7 (with and without colour) share one LAS 1.4 file."""
    from archive.query.export import extract

    shelf_root, _, _ = small_shelf
    shelf = open_shelf(str(shelf_root))
    north = shelf.find(station="north", start="2026-09-01", end="2026-09-01")
    box = north.central_bbox(0.1)
    out = tmp_path / "north.laz"
    result = extract(str(shelf_root), str(out), box, station="north", start="2026-09-01", end="2026-09-01")
    las = laspy.read(out)  # reference: laspy
    assert len(las.points) == result.points == north.read_points(bbox=box).num_rows > 0
    assert las.header.point_format.id == 7  # colour kept from the scan that has it
    assert result.scans == 2
