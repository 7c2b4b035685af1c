"""``grid_shelf`` and the ``grid``/``change`` commands over a shelf's Parquet points."""

from __future__ import annotations

import json
from datetime import datetime, timedelta, timezone

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import xarray as xr
from click.testing import CliRunner
from pyproj import CRS
from scipy.stats import binned_statistic_2d

from archive.cli.grids import change_command, grid_command
from archive.grids import grid_shelf, open_cube, read_spec
from archive.layout import ScanId, points_path
from archive.points.coords import decimal_from_units

EPSG = "EPSG:32633"
T0 = datetime(2026, 2, 1, 8, tzinfo=timezone.utc)


def write_scan(root, station: str, t: datetime, x, y, z) -> None:
    """Points in the shelf's format: x, y, z as DECIMAL(18, 3), CRS as PROJJSON in the metadata."""
    scan = ScanId(station, t)
    cols = {c: decimal_from_units(np.rint(v * 1000).astype(np.int64), 3) for c, v in zip("xyz", (x, y, z))}
    table = pa.table(cols).replace_schema_metadata(
        {b"scanshelf": json.dumps({"scan_id": str(scan), "station": station, "crs": CRS.from_user_input(EPSG).to_json_dict()})})
    path = root / points_path(scan)
    path.parent.mkdir(parents=True, exist_ok=True)
    pq.write_table(table, path, row_group_size=5_000)


def make_shelf(tmp_path):
    rng = np.random.default_rng(2)
    pts = {}
    for i in range(3):
        n = 30_000
        x = np.round(rng.uniform(600000, 600050, n), 3)
        y = np.round(rng.uniform(7000000, 7000030, n), 3)
        z = np.round(50 + 0.1 * x % 1 + i * 0.25 + rng.normal(0, 0.01, n), 3)
        t = T0 + timedelta(days=[20, 0, 10][i])  # written out of time order
        write_scan(tmp_path, "north", t, x, y, z)
        pts[t] = (x, y, z)
    return pts


def test_grid_shelf_bins_the_parquet_points(tmp_path):
    pts = make_shelf(tmp_path)
    (result,) = grid_shelf(str(tmp_path), cell=2.0, margin=4.0)
    spec = result.spec
    assert (result.scans, result.points, result.outside) == (3, 90_000, 0)
    assert spec.cell == 2.0 and spec.x0 == 599996.0 and read_spec(str(tmp_path / result.cube)) == spec
    ds = open_cube(str(tmp_path / result.cube))
    assert [str(s) for s in ds["scan_id"].values] == [str(ScanId("north", t)) for t in sorted(pts)]
    x, y, z = pts[T0 + timedelta(days=10)]
    edges = (np.arange(spec.nx + 1) * spec.cell + spec.x0, np.arange(spec.ny + 1) * spec.cell + spec.y0)
    # reference: scipy.stats.binned_statistic_2d on the decimals read as float64
    ref = binned_statistic_2d(x, y, z, "mean", bins=edges).statistic.T[::-1]
    # stored through numcodecs Quantize(digits=3): step 2^-10 m, so half a step plus float32 rounding
    np.testing.assert_allclose(ds["elevation"].isel(time=1).values, ref, atol=2**-11 + 1e-4)
    assert open_cube(str(tmp_path / result.cube), layout="series").sizes["time"] == 3


def test_grid_and_change_commands(tmp_path):
    make_shelf(tmp_path)
    runner = CliRunner()
    out = runner.invoke(grid_command, [str(tmp_path), "--cell", "1", "--station", "north"])
    assert out.exit_code == 0, out.output
    assert "grids/north.zarr: 3 scans" in out.output and "0 outside" in out.output
    area = tmp_path / "stable.geojson"
    area.write_text(json.dumps({"type": "Feature", "properties": {}, "geometry": {
        "type": "Polygon", "coordinates": [[[600000, 7000000], [600020, 7000000], [600020, 7000020], [600000, 7000020], [600000, 7000000]]]}}))
    tif = tmp_path / "change.tif"
    out = runner.invoke(change_command, [str(tmp_path), "--station", "north", "--from", "2026-02-01T08:00:00Z",
                                         "--to", "2026-02-21", "--stable-area", str(area), "-o", str(tif)])
    assert out.exit_code == 0, out.output
    assert "stable_cells: 400" in out.output and tif.exists()
    median = float(next(line for line in out.output.splitlines() if line.startswith("stable_median_m")).split(": ")[1])
    assert abs(median + 0.25) < 0.01  # offsets by time: T0 +0.25 m, T0+20 d +0.00 m
    assert "Example" in grid_command.help and "Example" in change_command.help
    assert xr.open_zarr(tmp_path / "grids" / "north.zarr").sizes["time"] == 3


def test_regrid_bins_the_coordinates_migrate_binned(tmp_path):
    """Re-gridding reads x, y, z as the LAS reader computes them, as migrate does.

    With offset 0.1 and scale 0.001, X * scale + offset lands one float step below a whole metre
    for most X near -5.2e8 (x near -524 km, a local frame), where the decimal cast gives the metre
    itself: every point on such a cell edge would change cell between migrate and `scanshelf grid`.
    """
    import laspy

    from archive.migrate import migrate

    rng = np.random.default_rng(4)
    header = laspy.LasHeader(point_format=6, version="1.4")
    header.scales = np.array([0.001, 0.001, 0.001])
    header.offsets = np.array([0.1, 0.1, 0.0])
    las = laspy.LasData(header)
    n = 4_000
    metres = rng.integers(-524_300, -524_260, (2, n))
    edge = rng.random((2, n)) < 0.5  # half of the coordinates exactly on whole metres
    las.X, las.Y = np.where(edge, metres * 1000 - 100, metres * 1000 + rng.integers(0, 1000, (2, n))).astype(np.int32)
    las.Z = rng.integers(10_000, 12_000, n).astype(np.int32)
    las.gps_time = 1.4e9 + np.arange(n) * 1e-3
    source = tmp_path / "source" / "north" / "north_20260301_080000.las"
    source.parent.mkdir(parents=True)
    las.write(str(source))
    shelf = tmp_path / "shelf"
    result = migrate(str(tmp_path / "source"), str(shelf), crs="none", cell=1.0)
    assert result.points == n and not result.failed, result.summary()
    cube = shelf / "grids" / "north.zarr"
    spec = read_spec(str(cube))
    # reference: laspy's scaled coordinates (X * scale + offset, as the LAS specification reads them)
    back = laspy.read(str(source))
    cols = np.floor((np.asarray(back.x) - spec.x0) / spec.cell).astype(int)
    rows = spec.ny - 1 - np.floor((np.asarray(back.y) - spec.y0) / spec.cell).astype(int)
    expected = np.zeros((spec.ny, spec.nx), np.uint32)
    np.add.at(expected, (rows, cols), 1)
    np.testing.assert_array_equal(open_cube(str(cube))["point_count"].isel(time=0).values, expected)
    (regridded,) = grid_shelf(str(shelf), series=False)
    assert regridded.points == n
    np.testing.assert_array_equal(open_cube(str(cube))["point_count"].isel(time=0).values, expected)
