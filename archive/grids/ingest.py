"""Ingest legacy grid files (DEMs, displacement and strain-rate grids) into Zarr v3 on their own grid.

Values are kept as stored (raw dtype, nodata as the Zarr fill value, scale/offset attributes
untouched), with CF attributes and a ``spatial_ref`` grid mapping (CRS WKT and GDAL
GeoTransform) so xarray, rioxarray and GDAL read them back on the same grid. Nothing is
resampled.

Files stamped with a time in their name become one time step of ``grids/<station>-<product>.zarr``
(later files of the same product and grid append; the same file again replaces its step).
Files without a stamp are stored without a time axis, one file per product.
"""

from __future__ import annotations

import math
import re
import uuid
from dataclasses import dataclass
from datetime import datetime, timezone
from pathlib import PurePosixPath

import numpy as np
import xarray as xr
from pyproj import CRS
from zarr.codecs import ZstdCodec

from archive.grids.cube import zarr_store
from archive.layout import check_station, grid_path
from archive.sources.grids import COMPONENTS, grid_format, guess_product, local_copy, open_grid, time_from_name
from archive.storage import filesystem

CHUNK = 256


class GridCrsMissing(ValueError):
    """A grid file declares no CRS and none was supplied."""


@dataclass(frozen=True)
class IngestedGrid:
    source: str  # the file's name as given
    dest: str  # shelf-relative path of the Zarr store
    product: str
    shape: tuple[int, int]
    crs_wkt: str
    variables: tuple[str, ...]
    time: datetime | None


def _variable_names(ds: xr.Dataset, product: str) -> dict[str, str]:
    """Old name -> our name: vx/vy/vz for displacement components, 'elevation' for a lone DEM."""
    names = list(ds.data_vars)
    generic = all(re.fullmatch(r"band\d+|Band\d+", n) for n in names)
    if product == "displacement":
        if generic and len(names) in (2, 3):
            return dict(zip(names, ("vx", "vy", "vz")))
        out = {}
        for n in names:
            for ours, aliases in COMPONENTS.items():
                if n.lower() in aliases:
                    out[n] = ours
        return {n: out.get(n, _plain(n)) for n in names}
    if product == "dem" and len(names) == 1:
        return {names[0]: "elevation"}
    if product == "strain" and generic:
        return {n: "strain_rate" if len(names) == 1 else f"strain_rate_{i + 1}" for i, n in enumerate(names)}
    return {n: _plain(n) for n in names}


def _plain(name: str) -> str:
    return re.sub(r"[^A-Za-z0-9_]+", "_", name).strip("_").lower() or "value"


def _encoding(ds: xr.Dataset) -> dict:
    enc = {}
    for name, var in ds.data_vars.items():
        ny, nx = var.sizes[var.dims[-2]], var.sizes[var.dims[-1]]
        cy, cx = min(CHUNK, ny), min(CHUNK, nx)
        lead = (1,) * (var.ndim - 2)
        enc[name] = {
            "chunks": lead + (cy, cx),
            "shards": lead + (math.ceil(ny / cy) * cy, math.ceil(nx / cx) * cx),
            "compressors": [ZstdCodec(level=3)],
        }
        fill = var.encoding.get("_FillValue")
        if fill is not None:
            enc[name]["_FillValue"] = fill
    if "time" in ds.coords:
        enc["time"] = {"units": "seconds since 1970-01-01", "calendar": "proleptic_gregorian", "dtype": "int64", "chunks": (4096,)}
        enc["source"] = {"chunks": (4096,)}
    return enc


def _prepare(ds: xr.Dataset, crs: CRS, product: str, source: str) -> xr.Dataset:
    ds = ds.rename(_variable_names(ds, product))
    old_mapping = [c for c in ds.coords if ds[c].ndim == 0 and ("crs_wkt" in ds[c].attrs or "spatial_ref" in ds[c].attrs)]
    ds = ds.drop_vars(old_mapping)
    for c in ds.coords.values():  # undecoded NetCDF coordinates may carry a fill value: not wanted
        c.attrs.pop("_FillValue", None)
        c.attrs.pop("missing_value", None)
    for v in ds.data_vars.values():
        for key in ("_FillValue", "missing_value"):
            if key in v.attrs:
                value = v.attrs.pop(key)
                if key == "_FillValue" or "_FillValue" not in v.encoding:
                    v.encoding["_FillValue"] = value
        v.attrs.pop("grid_mapping", None)
        v.attrs = {k: (list(x) if isinstance(x, tuple) else x) for k, x in v.attrs.items()}
    if "elevation" in ds.data_vars and "units" not in ds["elevation"].attrs and crs.axis_info:
        # formats like ESRI ASCII grid carry no units: a DEM's heights are taken to be in the
        # unit of the CRS axes (common practice), and the attributes say so
        ds["elevation"].attrs["units"] = {"metre": "m", "foot": "ft", "US survey foot": "US_survey_foot"}.get(
            crs.axis_info[0].unit_name, crs.axis_info[0].unit_name)
        ds["elevation"].attrs["comment"] = "units not stored in the source file; assumed from the CRS axis unit"
    ds = ds.rio.write_crs(crs, grid_mapping_name="spatial_ref")
    ds = ds.rio.write_transform(ds.rio.transform(recalc=True))
    for v in ds.data_vars.values():
        v.attrs["grid_mapping"] = "spatial_ref"
    ds.attrs.update({"Conventions": "CF-1.10", "scanshelf:product": product, "scanshelf:source": source})
    return ds


def ingest_grid(
    path_or_url: str,
    shelf_url: str,
    station: str,
    product: str | None = None,
    crs: str | None = None,
    time: datetime | None = None,
    storage_options: dict | None = None,
    shelf_storage_options: dict | None = None,
) -> IngestedGrid:
    """Copy one legacy grid file into ``grids/<station>-<product>.zarr`` of the shelf.

    ``crs`` is used only when the file declares none (site_file ``[[grids.files]] crs``);
    ``time`` (UTC-aware) defaults to a stamp in the file name read as UTC.
    """
    check_station(station)
    fmt = grid_format(path_or_url)
    fs, path = filesystem(path_or_url, storage_options)
    with local_copy(fs, path) as local:
        try:
            ds = open_grid(local, fmt)
        except Exception as e:
            raise ValueError(f"{path_or_url}: cannot read as {fmt} grid ({e})") from e
    source = PurePosixPath(path_or_url).name
    product = product or guess_product(path_or_url, tuple(str(v) for v in ds.data_vars))
    file_crs = ds.rio.crs
    if file_crs is None and crs is None:
        raise GridCrsMissing(
            f"{path_or_url}: the grid declares no CRS; set `crs` in the site file's [[grids.files]] "
            f"entry whose pattern matches this file (or pass --crs EPSG:xxxx)"
        )
    target_crs = CRS.from_user_input(file_crs.to_wkt() if file_crs is not None else crs)
    ds = _prepare(ds, target_crs, product, source)
    if time is None:
        stamp = time_from_name(path_or_url)
        time = stamp.replace(tzinfo=timezone.utc) if stamp else None
    if time is not None and "time" not in ds.dims:
        t = np.datetime64(time.astimezone(timezone.utc).replace(tzinfo=None), "ns")
        ds = ds.expand_dims(time=[t]).assign_coords(source=("time", np.array([source], dtype=object)))
    dest = grid_path(station, _plain(product))
    url = f"{shelf_url.rstrip('/')}/{dest}"
    _write(ds, url, source, shelf_storage_options)
    return IngestedGrid(source, dest, product, (int(ds.rio.height), int(ds.rio.width)),
                        target_crs.to_wkt(), tuple(str(v) for v in ds.data_vars), time)


def _write(ds: xr.Dataset, url: str, source: str, storage_options: dict | None) -> None:
    fs, path = filesystem(url, storage_options)
    if not fs.exists(f"{path}/zarr.json"):
        _write_new(ds, url, fs, path, storage_options)
        return
    old = xr.open_zarr(zarr_store(url, storage_options), zarr_format=3, consolidated=True)
    same_grid = (
        old.sizes.get("x") == ds.sizes.get("x") and old.sizes.get("y") == ds.sizes.get("y")
        and np.allclose(old["x"].values, ds["x"].values) and np.allclose(old["y"].values, ds["y"].values)
        and CRS.from_wkt(old["spatial_ref"].attrs["crs_wkt"]) == CRS.from_wkt(ds["spatial_ref"].attrs["crs_wkt"])
    )
    timed = "time" in ds.dims and "source" in old.coords and "source" in ds.coords
    if timed and same_grid:
        sources = np.asarray(old["source"].values, dtype=object)
        slot = np.flatnonzero(sources == source)
        store = zarr_store(url, storage_options)
        if slot.size:
            i = int(slot[0])
            ds.drop_vars(["x", "y", "spatial_ref"]).to_zarr(store, zarr_format=3, consolidated=True, region={"time": slice(i, i + 1)})
        else:
            ds.to_zarr(store, zarr_format=3, consolidated=True, append_dim="time")
        return
    if old.attrs.get("scanshelf:source") == source and not timed:
        _write_new(ds, url, fs, path, storage_options, replace=True)
        return
    raise ValueError(
        f"{url} already holds {old.attrs.get('scanshelf:source')!r} on {'another' if not same_grid else 'the same'} grid; "
        f"{source} cannot join it: give it its own product name in the site file ([[grids.files]] product = ...)"
        + ("" if same_grid else " or ask for resampling onto the station grid")
    )


def _write_new(ds, url, fs, path, storage_options, replace: bool = False) -> None:
    suffix = f".tmp-{uuid.uuid4().hex[:8]}"
    for v in ds.variables.values():
        v.encoding = {k: x for k, x in v.encoding.items() if k == "_FillValue"}
    ds.to_zarr(zarr_store(url.rstrip("/") + suffix, storage_options), zarr_format=3, consolidated=True,
               mode="w-", encoding=_encoding(ds))
    if replace:
        fs.rm(path, recursive=True)
    fs.mv(path + suffix, path, recursive=True)
