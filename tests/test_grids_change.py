"""Change maps between epochs, stable-area statistics, exports and pictures."""

from __future__ import annotations

from datetime import datetime, timedelta, timezone

import numpy as np
import pytest
import rioxarray
import xarray as xr
from pyproj import CRS
from scipy.stats import median_abs_deviation
from shapely.geometry import box

from archive.grids import GridSpec, bin_points, elevation_change, write_epoch
from archive.report import render_preview

EPSG = "EPSG:32633"
T0 = datetime(2026, 5, 1, 12, tzinfo=timezone.utc)
PNG_MAGIC = b"\x89PNG\r\n\x1a\n"  # reference: PNG specification, file signature


@pytest.fixture()
def shelf(tmp_path):
    """Three epochs; the east half sinks 2 m between the first and the last, the west half is stable."""
    spec = GridSpec.from_bounds("north", (1000.0, 2000.0, 1059.0, 2039.0), cell=1.0, margin=0.0,
                                crs_wkt=CRS.from_user_input(EPSG).to_wkt())
    gx, gy = np.meshgrid(spec.x, spec.y)
    rng = np.random.default_rng(5)
    for i, days in enumerate((0, 30, 60)):
        x = np.repeat(gx.ravel(), 4) + rng.uniform(-0.4, 0.4, gx.size * 4)
        y = np.repeat(gy.ravel(), 4) + rng.uniform(-0.4, 0.4, gx.size * 4)
        z = 300.0 + rng.normal(0, 0.01, x.size) + np.where(x > 1030.0, -1.0 * i, 0.0) + 0.003 * i
        keep = ~((x > 1050) & (y > 2030)) if i == 2 else np.ones(x.size, bool)  # a gap in the last scan
        write_epoch(str(tmp_path / "grids" / "north.zarr"), spec, T0 + timedelta(days=days),
                    f"north-{T0 + timedelta(days=days):%Y%m%dT%H%M%SZ}", bin_points(spec, x[keep], y[keep], z[keep]))
    return tmp_path, spec


def test_change_between_nearest_epochs_with_stable_area(shelf):
    root, spec = shelf
    stable = box(1000.0, 2000.0, 1029.0, 2040.0)
    r = elevation_change(str(root), "north", "2026-05-02T00:00:00Z", T0 + timedelta(days=59), stable_area=stable)
    assert (r.scan0, r.scan1) == ("north-20260501T120000Z", "north-20260630T120000Z")
    d = r.change.values
    assert r.valid_cells == np.isfinite(d).sum() == spec.nx * spec.ny - 100  # 10 x 10 gap
    assert np.nanmedian(d[:, spec.x > 1031]) == pytest.approx(-2.0, abs=0.02)
    inside = (spec.x[None, :] < 1029.0) & np.ones((spec.ny, 1), bool)
    ref = d[inside]
    assert r.stable_cells == ref.size == 29 * spec.ny
    assert r.stable_median == pytest.approx(np.median(ref)) and r.stable_median == pytest.approx(0.006, abs=0.003)
    # reference: scipy.stats.median_abs_deviation with scale="normal" (the NMAD, 1/Φ⁻¹(3/4) ≈ 1.4826)
    assert r.stable_nmad == pytest.approx(median_abs_deviation(ref, scale="normal"), rel=1e-4)
    assert r.stable_std == pytest.approx(np.std(ref))


def test_geojson_stable_area_and_same_epoch_error(shelf):
    root, _ = shelf
    poly = {"type": "Polygon", "coordinates": [[[1000, 2000], [1010, 2000], [1010, 2010], [1000, 2010], [1000, 2000]]]}
    r = elevation_change(str(root), "north", T0, T0 + timedelta(days=30), stable_area=poly)
    assert r.stable_cells == 100
    with pytest.raises(ValueError, match="both select"):
        elevation_change(str(root), "north", T0, T0 + timedelta(days=1))


def test_exports_read_back_by_rioxarray_xarray_and_as_png(shelf, tmp_path):
    root, spec = shelf
    r = elevation_change(str(root), "north", T0, T0 + timedelta(days=60))
    r.export(str(tmp_path / "c.tif"))
    r.export(str(tmp_path / "c.zarr"))
    r.export(str(tmp_path / "c.png"))
    # reference: rioxarray reads the GeoTIFF back with the grid's affine transform and CRS
    tif = rioxarray.open_rasterio(tmp_path / "c.tif", masked=True)
    assert tif.rio.transform() == spec.transform
    assert CRS.from_wkt(tif.rio.crs.to_wkt()) == CRS.from_user_input(EPSG)
    np.testing.assert_array_equal(tif.values[0], r.change.values)
    z = xr.open_zarr(tmp_path / "c.zarr")  # reference: plain xarray
    np.testing.assert_array_equal(z["elevation_change"].values, r.change.values)
    assert (tmp_path / "c.png").read_bytes()[:8] == PNG_MAGIC


def test_preview_png_of_one_epoch(shelf, tmp_path):
    root, spec = shelf
    ds = xr.open_zarr(root / "grids" / "north.zarr")
    out = tmp_path / "p.png"
    render_preview(ds.isel(time=[0]), str(out), title="north")
    data = out.read_bytes()
    assert data[:8] == PNG_MAGIC and len(data) > 5_000
    with pytest.raises(ValueError, match="one epoch"):
        render_preview(ds, str(tmp_path / "q.png"))
