"""Legacy grid files (GeoTIFF, NetCDF, ESRI ASCII grid) probed and ingested into Zarr v3."""

from __future__ import annotations

from datetime import datetime, timezone
from pathlib import Path

import fsspec
import numpy as np
import pytest
import rasterio
import rioxarray  # noqa: F401
import xarray as xr
from pyproj import CRS
from rasterio.transform import from_origin

from archive.grids import GridCrsMissing, ingest_grid
from archive.sources.grids import probe_grid

EPSG = "EPSG:32633"
TRANSFORM = from_origin(500000.0, 7651000.0, 2.0, 2.0)
NODATA = -9999.0


def values(rows=30, cols=20) -> np.ndarray:
    a = (200.0 + np.arange(rows * cols, dtype=np.float32).reshape(rows, cols) / 7).astype(np.float32)
    a[0, 0] = NODATA
    return a


def write_tif(path: Path, bands: np.ndarray, crs: str | None, names=None, units="m") -> Path:
    with rasterio.open(path, "w", driver="GTiff", height=bands.shape[1], width=bands.shape[2], count=bands.shape[0],
                       dtype="float32", crs=crs, transform=TRANSFORM, nodata=NODATA) as out:
        out.write(bands)
        for i in range(bands.shape[0]):
            if names:
                out.set_band_description(i + 1, names[i])
            out.set_band_unit(i + 1, units)
    return path


def test_geotiff_dem_keeps_values_nodata_crs_and_transform(tmp_path):
    src = write_tif(tmp_path / "north_dem_20240301.tif", values()[None], EPSG)
    probe = probe_grid(fsspec.filesystem("file"), str(src))
    assert (probe.format, probe.product, probe.shape) == ("geotiff", "dem", (30, 20))
    assert probe.time == datetime(2024, 3, 1, tzinfo=timezone.utc)
    assert probe.transform == TRANSFORM.to_gdal() and probe.crs_source == "file"
    got = ingest_grid(str(src), str(tmp_path / "shelf"), "north")
    assert got.dest == "grids/north-dem.zarr" and got.variables == ("elevation",)
    ds = xr.open_zarr(tmp_path / "shelf" / got.dest)  # reference: plain xarray decoding (CF _FillValue → NaN)
    # reference: rasterio reading the source file
    with rasterio.open(src) as f:
        ref = f.read(1, masked=True)
    np.testing.assert_array_equal(ds["elevation"].values[0], ref.filled(np.nan))
    assert ds["elevation"].attrs["units"] == "m"
    assert ds["elevation"].encoding["_FillValue"] == NODATA
    # reference: rioxarray recovers CRS and transform from the CF grid mapping
    assert ds.rio.transform() == TRANSFORM
    assert CRS.from_user_input(ds.rio.crs.to_wkt()) == CRS.from_user_input(EPSG)


def test_netcdf_displacement_components_and_strain_rates(tmp_path):
    a = values()
    x = TRANSFORM.c + 1.0 + 2.0 * np.arange(a.shape[1])
    y = TRANSFORM.f - 1.0 - 2.0 * np.arange(a.shape[0])
    ds = xr.Dataset({"dx": (("y", "x"), a, {"units": "m"}), "dy": (("y", "x"), a * 2, {"units": "m"}),
                     "dz": (("y", "x"), a * 3, {"units": "m"}), "strain_rate_xx": (("y", "x"), a * 1e-6, {"units": "a-1"})},
                    coords={"x": x, "y": y}).rio.write_crs(EPSG)
    src = tmp_path / "north_displacement_20240301T120000.nc"
    ds.to_netcdf(src, engine="h5netcdf")
    got = ingest_grid(str(src), str(tmp_path / "shelf"), "north")
    assert got.product == "displacement" and set(got.variables) == {"vx", "vy", "vz", "strain_rate_xx"}
    out = xr.open_zarr(tmp_path / "shelf" / "grids" / "north-displacement.zarr")
    np.testing.assert_array_equal(out["vy"].values[0], a * 2)
    assert out["strain_rate_xx"].attrs["units"] == "a-1"
    assert out.rio.transform() == TRANSFORM
    # the same file again replaces its time step instead of adding one
    ingest_grid(str(src), str(tmp_path / "shelf"), "north")
    assert xr.open_zarr(tmp_path / "shelf" / "grids" / "north-displacement.zarr").sizes["time"] == 1


def test_ascii_grid_crs_from_prj_and_missing_crs(tmp_path):
    def asc(name, crs):
        with rasterio.open(tmp_path / name, "w", driver="AAIGrid", height=30, width=20, count=1, dtype="float32",
                           crs=crs, transform=TRANSFORM, nodata=NODATA) as out:
            out.write(values(), 1)
        return tmp_path / name

    with_prj = asc("dem_20230101.asc", EPSG)
    assert with_prj.with_suffix(".prj").exists()
    got = ingest_grid(str(with_prj), str(tmp_path / "shelf"), "south")
    assert CRS.from_wkt(got.crs_wkt) == CRS.from_user_input(EPSG)
    bare = asc("dem_bare.asc", None)
    assert probe_grid(fsspec.filesystem("file"), str(bare)).crs_wkt is None
    with pytest.raises(GridCrsMissing, match=r"dem_bare\.asc.*\[\[grids\.files\]\].*--crs"):
        ingest_grid(str(bare), str(tmp_path / "shelf"), "east")
    fixed = ingest_grid(str(bare), str(tmp_path / "shelf"), "east", crs=EPSG)
    assert CRS.from_wkt(fixed.crs_wkt) == CRS.from_user_input(EPSG) and fixed.time is None


def test_foreign_crs_stays_on_its_own_grid(tmp_path):
    src = write_tif(tmp_path / "velocity.tif", np.stack([values(), values(), values()]), "EPSG:32632", names=["vx", "vy", "vz"],
                    units="m d-1")
    got = ingest_grid(str(src), str(tmp_path / "shelf"), "south", product="displacement")
    ds = xr.open_zarr(tmp_path / "shelf" / got.dest)
    assert CRS.from_wkt(ds["spatial_ref"].attrs["crs_wkt"]) == CRS.from_user_input("EPSG:32632")
    assert ds.rio.transform() == TRANSFORM and ds["vz"].attrs["units"] == "m d-1"


def test_demo_products_of_each_kind(tmp_path):
    from archive.demo import grids as demo
    t0, t1 = 1.70e9, 1.72e9
    records = demo.write_products(tmp_path / "src", {"north": [t0, t1], "south": [t0, 1.71e9, t1]})
    fs = fsspec.filesystem("file")
    seen = set()
    for rec in records:
        path = str(tmp_path / "src" / rec["path"])
        probe = probe_grid(fs, path, rec["path"])
        assert probe.shape == tuple(rec["shape"]), rec["path"]
        assert probe.format == rec["format"], rec["path"]  # one format, one id: the survey's and the answer key's
        assert (probe.crs_wkt is None) == (rec["crs"] is None), rec["path"]
        crs = None if rec["crs"] else rec["intended_crs"]
        got = ingest_grid(path, str(tmp_path / "shelf"), rec["station"], product=rec["product"], crs=crs)
        ds = xr.open_zarr(tmp_path / "shelf" / got.dest)
        assert set(rec["variables"]) <= set(ds.data_vars) | {"elevation"}, rec["path"]
        assert ds.rio.transform() == rasterio.Affine(*rec["transform"]), rec["path"]
        assert CRS.from_wkt(got.crs_wkt) == CRS.from_user_input(rec["crs"] or rec["intended_crs"])
        for name, unit in rec["units"].items():
            assert ds[name].attrs.get("units") == unit, (rec["path"], name)
        seen.add((rec["format"], rec["product"]))
    assert {f for f, _ in seen} == {"geotiff", "netcdf", "aaigrid"}
    # the north DEMs (GeoTIFF then NetCDF, same grid, stamped names) form one time series
    assert xr.open_zarr(tmp_path / "shelf" / "grids" / "north-dem.zarr").sizes["time"] == 2
    assert {p for _, p in seen} >= {"dem", "displacement", "strain_rate"}


def test_site_file_grid_rule_gives_station_product_and_crs(tmp_path):
    from archive import survey
    from archive.sitefile import parse_site_file

    source = tmp_path / "src"
    source.mkdir()
    write_tif(source / "flow_20230101.tif", values()[None], None)  # at the root: no station folder
    rules = {"site": {"crs": "EPSG:4326"},
             "grids": {"files": [{"pattern": r"^flow_", "product": "displacement", "crs": EPSG, "station": "east"}]}}
    (row,) = survey(str(source), parse_site_file(rules, "test")).files
    assert (row.kind, row.status, row.station, row.product) == ("grid", "ok", "east", "displacement")
    assert CRS.from_wkt(row.crs_wkt) == CRS.from_user_input(EPSG)  # the rule's CRS beats the site's
    (row,) = survey(str(source)).files  # without the rule the root file has no station
    assert row.status == "unusable" and "station" in row.problems[0]
