"""Station grid spec and streaming binning, checked against scipy and rasterio."""

from __future__ import annotations

import numpy as np
import pytest
import rasterio.transform
from scipy.stats import binned_statistic_2d

from archive.grids import GridAccumulator, GridSpec, bin_points

CRS = "EPSG:32633"


def test_from_bounds_snaps_to_whole_cells_and_covers_the_margin():
    spec = GridSpec.from_bounds("north", (500012.3, 7650001.7, 500087.9, 7650040.2), cell=2.0, margin=10.0, crs_wkt=CRS)
    assert (spec.x0, spec.y0) == (500002.0, 7649990.0)
    assert spec.x0 % 2.0 == 0 and spec.y0 % 2.0 == 0
    assert spec.x1 >= 500097.9 and spec.y1 >= 7650050.2
    assert (spec.nx, spec.ny) == (48, 31)
    assert GridSpec.from_dict(spec.to_dict()) == spec


def test_cell_centres_match_rasterio_for_the_same_transform():
    spec = GridSpec.from_bounds("north", (100.0, 200.0, 130.0, 250.0), cell=0.5, margin=1.0, crs_wkt=CRS)
    rows, cols = np.arange(spec.ny), np.arange(spec.nx)
    # reference: rasterio.transform.xy gives cell-centre coordinates of (row, col) for an affine
    xs, _ = rasterio.transform.xy(spec.transform, np.zeros_like(cols), cols, offset="center")
    _, ys = rasterio.transform.xy(spec.transform, rows, np.zeros_like(rows), offset="center")
    np.testing.assert_allclose(spec.x, xs)
    np.testing.assert_allclose(spec.y, ys)
    assert spec.y[0] > spec.y[-1]  # north-up


def test_mean_std_count_equal_scipy_binned_statistic_2d():
    rng = np.random.default_rng(7)
    spec = GridSpec.from_bounds("north", (0.0, 0.0, 40.0, 30.0), cell=1.0, margin=0.0, crs_wkt=CRS)
    n = 60_000
    x = rng.uniform(spec.x0, spec.x1, n)
    y = rng.uniform(spec.y0, spec.y1, n)
    z = 2150.0 + 0.3 * x - 0.1 * y + rng.normal(0, 0.05, n)  # large common offset, small spread
    acc = GridAccumulator(spec)
    for i in range(0, n, 7_000):  # streamed in uneven chunks
        acc.add(x[i:i + 7_000], y[i:i + 7_000], z[i:i + 7_000])
    got = acc.finish()
    edges = (np.linspace(spec.x0, spec.x1, spec.nx + 1), np.linspace(spec.y0, spec.y1, spec.ny + 1))
    # reference: scipy.stats.binned_statistic_2d (statistic[ix, iy], y ascending; std is ddof=0)
    ref = {s: binned_statistic_2d(x, y, z, statistic=s, bins=edges).statistic for s in ("mean", "std", "count")}
    north_up = {k: v.T[::-1] for k, v in ref.items()}
    np.testing.assert_array_equal(got.point_count, north_up["count"].astype(np.uint32))
    np.testing.assert_allclose(got.elevation, north_up["mean"], rtol=0, atol=2e-4)  # float32 at ~2000 m
    np.testing.assert_allclose(got.elevation_std, north_up["std"], rtol=1e-4, atol=1e-6)
    assert got.elevation.dtype == np.float32 and got.point_count.dtype == np.uint32
    assert got.outside == 0 and got.inside == n


def test_points_outside_are_counted_and_empty_cells_are_nan():
    spec = GridSpec(station="north", crs_wkt=CRS, x0=0.0, y0=0.0, cell=1.0, nx=4, ny=3)
    x = np.array([0.5, 0.5, 3.9, -0.1, 4.0, 2.0, np.nan])
    y = np.array([0.5, 0.5, 2.9, 1.0, 1.0, 3.0, 1.0])
    z = np.array([10.0, 12.0, 5.0, 99.0, 99.0, 99.0, 99.0])
    got = bin_points(spec, x, y, z)
    assert got.outside == 4  # x<x0, x==x1, y==y1 (half-open cells) and a NaN coordinate
    assert got.point_count[2, 0] == 2 and got.elevation[2, 0] == pytest.approx(11.0)
    assert got.elevation_std[2, 0] == pytest.approx(1.0)
    assert got.point_count[0, 3] == 1 and got.elevation_std[0, 3] == 0.0
    assert np.isnan(got.elevation[1, 1]) and got.point_count[1, 1] == 0
    assert got.point_count.sum() == 3


def test_std_is_stable_for_large_elevations():
    rng = np.random.default_rng(3)
    spec = GridSpec(station="north", crs_wkt=CRS, x0=0.0, y0=0.0, cell=10.0, nx=1, ny=1)
    z = 8848.0 + rng.normal(0, 0.001, 200_000)
    got = bin_points(spec, rng.uniform(0, 10, z.size), rng.uniform(0, 10, z.size), z)
    # reference: numpy.std (two-pass, ddof=0) on the same values
    assert got.elevation_std[0, 0] == pytest.approx(np.std(z), rel=1e-4)


def test_chunks_of_compact_blocks_with_outside_points_equal_scipy():
    # migrate feeds row groups in Hilbert order: each chunk covers a small block of the grid,
    # except sparse ones; some chunks hold points outside the grid or on its far edges
    rng = np.random.default_rng(11)
    spec = GridSpec(station="north", crs_wkt=CRS, x0=1000.0, y0=5000.0, cell=0.5, nx=37, ny=23)
    n = 50_000
    x = rng.uniform(spec.x0 - 2.0, spec.x1 + 2.0, n)
    y = rng.uniform(spec.y0 - 2.0, spec.y1 + 2.0, n)
    x[:40] = spec.x1  # half-open: the east and north edges are outside
    y[40:80] = spec.y1
    z = 812.5 + 0.02 * (x - spec.x0) + rng.normal(0, 0.2, n)
    order = np.lexsort(((x // 4.0), (y // 3.0)))  # compact blocks of 8 × 6 cells, block rows in turn
    x, y, z = x[order], y[order], z[order]
    acc = GridAccumulator(spec)
    bounds = [0, 3, 900, 901, 5_000, 20_000, 20_000, 33_333, n]
    for a, b in zip(bounds, bounds[1:]):
        acc.add(x[a:b], y[a:b], z[a:b])
    got = acc.finish()
    edges = (np.linspace(spec.x0, spec.x1, spec.nx + 1), np.linspace(spec.y0, spec.y1, spec.ny + 1))
    # scipy closes the last bin; the grid's cells are all half-open: its edge points are outside
    inside = (x < spec.x1) & (y < spec.y1)
    # reference: scipy.stats.binned_statistic_2d (statistic[ix, iy], y ascending; std is ddof=0;
    # points beyond the edges are not binned)
    ref = {s: binned_statistic_2d(x[inside], y[inside], z[inside], statistic=s, bins=edges).statistic
           for s in ("mean", "std", "count")}
    north_up = {k: v.T[::-1] for k, v in ref.items()}
    inside &= (x >= spec.x0) & (y >= spec.y0)
    np.testing.assert_array_equal(got.point_count, north_up["count"].astype(np.uint32))
    np.testing.assert_allclose(got.elevation, north_up["mean"], rtol=0, atol=1e-4)
    np.testing.assert_allclose(got.elevation_std, north_up["std"], rtol=1e-4, atol=1e-6)
    assert got.outside == n - int(inside.sum()) and got.inside == int(inside.sum())


def test_finish_ends_the_accumulator():
    spec = GridSpec(station="north", crs_wkt=CRS, x0=0.0, y0=0.0, cell=1.0, nx=2, ny=2)
    acc = GridAccumulator(spec)
    acc.add(np.array([0.5]), np.array([0.5]), np.array([3.0]))
    assert acc.finish().point_count.sum() == 1
    with pytest.raises(RuntimeError, match="called already"):
        acc.finish()
    with pytest.raises(RuntimeError, match="new accumulator"):
        acc.add(np.array([0.5]), np.array([0.5]), np.array([3.0]))
