"""Elevation change between two epochs of a station cube (DEM of difference).

Because every epoch of a station sits on the same fixed grid, the difference is a cell-by-cell
subtraction, with no resampling. When the user gives a stable area (ground known not to have
moved), the median and spread of the change there measure the co-registration error of the two
scans — common practice in DEM-difference work: a median far from zero means a vertical offset
between the scans, a large spread a tilt or a poor registration.

Caution: the change is only as good as the registration of the two scans and the point density
in each cell; check ``valid_cells`` and the stable-area figures before reading the map as ground
movement, and do not use it alone for hazard decisions.
"""

from __future__ import annotations

import os
import tempfile
from dataclasses import dataclass
from datetime import datetime, timezone

import numpy as np
import shapely
import shapely.geometry
import xarray as xr

from archive.grids.cube import open_cube, read_spec, zarr_store
from archive.layout import grid_path
from archive.storage import filesystem

NMAD_SCALE = 1.4826  # makes the median absolute deviation equal σ for normal errors (common practice)


@dataclass
class ChangeResult:
    """``change`` = elevation(t1) − elevation(t0) in metres, NaN where either epoch is empty."""

    change: xr.DataArray
    time0: datetime
    time1: datetime
    scan0: str
    scan1: str
    valid_cells: int
    stable_cells: int | None = None
    stable_median: float | None = None  # m
    stable_nmad: float | None = None  # m, 1.4826 × median(|d − median(d)|), robust to real change
    stable_std: float | None = None  # m, plain standard deviation (ddof=0), for comparison

    def summary(self) -> dict:
        d = {
            "scan0": self.scan0, "scan1": self.scan1,
            "time0": self.time0.isoformat(), "time1": self.time1.isoformat(),
            "valid_cells": self.valid_cells,
        }
        if self.stable_cells is not None:
            d.update(stable_cells=self.stable_cells, stable_median_m=self.stable_median,
                     stable_nmad_m=self.stable_nmad, stable_std_m=self.stable_std)
        return d

    def export(self, url: str, storage_options: dict | None = None) -> None:
        """Write to ``.zarr`` (Zarr v3), ``.tif`` (GeoTIFF via rioxarray) or ``.png`` by suffix."""
        lower = url.lower().rstrip("/")
        if lower.endswith(".zarr"):
            ds = self.change.to_dataset(name="elevation_change")
            ds.attrs.update({k: str(v) for k, v in self.summary().items()})
            ds.to_zarr(zarr_store(url, storage_options), zarr_format=3, consolidated=True, mode="w")
        elif lower.endswith((".tif", ".tiff")):
            _write_local_then_put(url, storage_options, self._write_tif)
        elif lower.endswith(".png"):
            from archive.report.previews import render_change

            _write_local_then_put(url, storage_options, lambda p: render_change(self, p))
        else:
            raise ValueError(f"cannot export a change map to {url!r}: use a .zarr, .tif or .png name")

    def _write_tif(self, path: str) -> None:
        import rioxarray  # noqa: F401  (registers .rio)

        da = self.change.drop_vars("spatial_ref", errors="ignore")
        crs_wkt = self.change.attrs.get("crs_wkt") or self.change.coords["spatial_ref"].attrs.get("crs_wkt")
        da = da.rio.write_crs(crs_wkt).rio.write_nodata(np.nan, encoded=False)
        da.attrs = {k: v for k, v in da.attrs.items() if k in ("units", "long_name")}
        da.rio.to_raster(path, tags={"scan0": self.scan0, "scan1": self.scan1})


def _write_local_then_put(url: str, storage_options: dict | None, write) -> None:
    """Write through a local temporary file, then move/upload it whole into place."""
    fs, path = filesystem(url, storage_options)
    suffix = os.path.splitext(path)[1]
    with tempfile.TemporaryDirectory() as tmp:
        local = os.path.join(tmp, "out" + suffix)
        write(local)
        parent = path.rsplit("/", 1)[0] if "/" in path else ""
        if parent:
            fs.makedirs(parent, exist_ok=True)
        fs.put_file(local, path + ".tmp")
        fs.mv(path + ".tmp", path)


def _utc_naive(t: datetime | str | np.datetime64) -> np.datetime64:
    if isinstance(t, str):
        t = datetime.fromisoformat(t.replace("Z", "+00:00"))
    if isinstance(t, datetime):
        if t.tzinfo is not None:
            t = t.astimezone(timezone.utc).replace(tzinfo=None)
        return np.datetime64(t, "ns")
    return np.datetime64(t, "ns")


def stable_mask(geometry, x: np.ndarray, y: np.ndarray) -> np.ndarray:
    """(ny, nx) mask of cell centres inside a shapely geometry or GeoJSON dict (grid CRS)."""
    geom = shapely.geometry.shape(geometry) if isinstance(geometry, dict) else geometry
    shapely.prepare(geom)
    xx, yy = np.meshgrid(x, y)
    return shapely.contains_xy(geom, xx, yy)


def elevation_change(
    shelf: str,
    station: str,
    t0: datetime | str,
    t1: datetime | str,
    stable_area=None,
    storage_options: dict | None = None,
) -> ChangeResult:
    """Difference of the epochs nearest to ``t0`` and ``t1`` in ``shelf``'s cube of ``station``.

    ``stable_area``: shapely geometry or GeoJSON dict in the grid's CRS; its cells give the
    median and NMAD (and std) of the change, i.e. the co-registration error estimate.
    """
    url = f"{shelf.rstrip('/')}/{grid_path(station)}"
    spec = read_spec(url, storage_options)
    if spec is None:
        raise FileNotFoundError(f"no elevation cube for station {station!r} at {url}; run `scanshelf grid {shelf}`")
    return epoch_change(open_cube(url, storage_options), t0, t1, spec.crs_wkt, stable_area)


def epoch_change(ds: xr.Dataset, t0: datetime | str, t1: datetime | str, crs_wkt: str,
                 stable_area=None) -> ChangeResult:
    """:func:`elevation_change` on a cube already open (from :func:`open_cube`), e.g. for several pairs."""
    a = ds.sel(time=_utc_naive(t0), method="nearest")
    b = ds.sel(time=_utc_naive(t1), method="nearest")
    if a["scan_id"].item() == b["scan_id"].item():
        raise ValueError(f"{t0} and {t1} both select scan {a['scan_id'].item()}; pick times nearer two different epochs")
    diff = (b["elevation"] - a["elevation"]).compute()
    diff = diff.drop_vars(["time", "scan_id"], errors="ignore").astype(np.float32)
    diff.name = "elevation_change"
    diff.attrs = {"units": "m", "long_name": f"elevation change {a['scan_id'].item()} to {b['scan_id'].item()}",
                  "grid_mapping": "spatial_ref", "crs_wkt": crs_wkt}
    values = diff.values
    valid = np.isfinite(values)
    result = ChangeResult(
        change=diff,
        time0=_as_utc(a["time"].values), time1=_as_utc(b["time"].values),
        scan0=str(a["scan_id"].item()), scan1=str(b["scan_id"].item()),
        valid_cells=int(valid.sum()),
    )
    if stable_area is not None:
        inside = stable_mask(stable_area, diff["x"].values, diff["y"].values) & valid
        d = values[inside].astype(np.float64)
        result.stable_cells = int(d.size)
        if d.size:
            med = float(np.median(d))
            result.stable_median = med
            result.stable_nmad = float(NMAD_SCALE * np.median(np.abs(d - med)))
            result.stable_std = float(np.std(d))
    return result


def _as_utc(t: np.datetime64) -> datetime:
    return datetime.fromisoformat(str(np.datetime64(t, "us"))).replace(tzinfo=timezone.utc)
