"""Probe legacy grid files (GeoTIFF, NetCDF, ESRI ASCII grid): what they are, before ingesting.

The survey calls :func:`probe_grid` for every file ``classify`` marks as a grid; ingestion
(:mod:`archive.grids.ingest`) reuses :func:`open_grid` so both agree on what a file holds.
"""

from __future__ import annotations

import contextlib
import os
import re
import shutil
import tempfile
from dataclasses import dataclass
from datetime import datetime, timezone
from pathlib import PurePosixPath
from typing import Iterator

import fsspec
import xarray as xr

SIDECARS = (".prj", ".aux.xml", ".tfw", ".tifw", ".wld", ".hdr")
_STAMP = re.compile(r"(?<!\d)(\d{8})(?:[_T-]?(\d{6})(?!\d))?(?!\d)")
_DISPLACEMENT = re.compile(r"(?i)displac|deform|(?<![a-z])disp(?![a-z])|offset|motion|velocit")
_STRAIN = re.compile(r"(?i)strain")

# component names seen in displacement products -> our variable names
COMPONENTS = {
    "vx": ("vx", "dx", "ux", "u", "east", "de", "disp_x", "displacement_x", "x_displacement", "dx_m", "e"),
    "vy": ("vy", "dy", "uy", "v", "north", "dn", "disp_y", "displacement_y", "y_displacement", "dy_m", "n"),
    "vz": ("vz", "dz", "uz", "w", "up", "du", "disp_z", "displacement_z", "z_displacement", "dz_m", "vertical"),
}


@dataclass(frozen=True)
class GridProbe:
    """Header facts of one grid file."""

    path: str
    format: str  # "geotiff", "netcdf", "aaigrid"
    crs_wkt: str | None
    crs_source: str | None  # "file", "site_file" (rule or site CRS) or None
    shape: tuple[int, int]  # (rows, cols)
    transform: tuple[float, float, float, float, float, float]  # GDAL order: x0, dx, rx, y0, ry, dy
    bounds: tuple[float, float, float, float]  # xmin, ymin, xmax, ymax
    variables: tuple[str, ...]  # band descriptions or NetCDF variable names
    product: str  # "dem", "displacement", "strain"
    time: datetime | None  # UTC, from a stamp in the file name


def grid_format(path: str) -> str:
    name = path.lower()
    if name.endswith((".tif", ".tiff")):
        return "geotiff"
    if name.endswith((".nc", ".nc4", ".cdf")):
        return "netcdf"
    if name.endswith((".asc", ".grd")):
        return "aaigrid"
    raise ValueError(f"{path}: not a grid file scanshelf reads (GeoTIFF .tif, NetCDF .nc, ESRI ASCII grid .asc)")


def time_from_name(path: str) -> datetime | None:
    """A YYYYMMDD[_T]HHMMSS or YYYYMMDD stamp in the file name, as a naive datetime."""
    m = _STAMP.search(PurePosixPath(path).name)
    if not m:
        return None
    try:
        return datetime.strptime(m[1] + (m[2] or "000000"), "%Y%m%d%H%M%S")
    except ValueError:
        return None


def guess_product(path: str, variables: tuple[str, ...]) -> str:
    """'displacement' (components, maybe with strain rates beside them), 'strain' or 'dem'."""
    text = " ".join((PurePosixPath(path).name, *variables))
    names = {v.lower() for v in variables}
    if _DISPLACEMENT.search(text) or sum(any(a in names for a in al) for al in COMPONENTS.values()) >= 2:
        return "displacement"
    if _STRAIN.search(text):
        return "strain"
    return "dem"


@contextlib.contextmanager
def local_copy(fs: fsspec.AbstractFileSystem, path: str) -> Iterator[str]:
    """A local path for ``path`` on ``fs``: itself when local, else a temporary copy with sidecars.

    GDAL finds an ESRI ASCII grid's CRS in its ``.prj`` beside it, so sidecars travel too.
    """
    if "file" in (fs.protocol if isinstance(fs.protocol, tuple) else (fs.protocol,)):
        yield path
        return
    tmp = tempfile.mkdtemp(prefix="scanshelf-grid-")
    try:
        local = os.path.join(tmp, PurePosixPath(path).name)
        fs.get_file(path, local)
        stem = path.rsplit(".", 1)[0]
        for side in SIDECARS:
            for cand in (stem + side, path + side):
                if fs.exists(cand):
                    fs.get_file(cand, os.path.join(tmp, PurePosixPath(cand).name))
        yield local
    finally:
        shutil.rmtree(tmp, ignore_errors=True)


def open_grid(local_path: str, fmt: str) -> xr.Dataset:
    """The file as an (undecoded: raw values, nodata kept) xarray Dataset with rioxarray's CRS."""
    import rioxarray  # noqa: F401  (registers .rio)

    if fmt == "netcdf":
        try:
            ds = xr.open_dataset(local_path, engine="h5netcdf", mask_and_scale=False, decode_coords="all")
        except OSError:  # NetCDF3 classic is not HDF5
            ds = xr.open_dataset(local_path, engine="scipy", mask_and_scale=False, decode_coords="all")
        grids = [v for v in ds.data_vars if ds[v].ndim >= 2]
        if not grids:
            raise ValueError(f"{local_path}: NetCDF file holds no 2-D grid variable")
        return ds[grids].load()
    da = rioxarray.open_rasterio(local_path, masked=False).load()
    names = da.attrs.get("long_name")
    if isinstance(names, str):
        names = (names,)
    if not names or len(names) != da.sizes["band"] or any(not n for n in names):
        names = tuple(f"band{i + 1}" for i in range(da.sizes["band"]))
    ds = xr.Dataset()
    for i, name in enumerate(names):
        band = da.isel(band=i, drop=True)
        band.attrs = {  # rioxarray gives per-band attributes (units, ...) as tuples
            k: (v[i] if isinstance(v, (tuple, list)) and len(v) == da.sizes["band"] else v)
            for k, v in da.attrs.items() if k != "long_name"
        }
        ds[name] = band
    if "spatial_ref" in da.coords:
        ds = ds.assign_coords(spatial_ref=da.coords["spatial_ref"])
    return ds


def probe_grid(fs: fsspec.AbstractFileSystem, path: str, relpath: str | None = None, site_file=None) -> GridProbe:
    """Format, CRS (or None), shape, transform, bounds, product guess and name stamp of a grid.

    ``relpath`` names the file in messages and is matched against the site file's
    ``[[grids.files]]`` rules; a rule's (else the site's) CRS fills in a missing CRS
    (``crs_source = "site_file"``) and its product overrides the guess. The name stamp is read in
    the site file's time zone and returned in UTC.
    """
    name = relpath or path
    fmt = grid_format(path)
    with local_copy(fs, path) as local:
        try:
            ds = open_grid(local, fmt)
        except Exception as e:  # rasterio/h5netcdf errors carry no file name
            raise ValueError(f"{name}: cannot read as {fmt} grid ({e})") from e
    rule = site_file.grid_rule(name) if site_file is not None else None
    crs = ds.rio.crs
    crs_wkt, crs_source = (crs.to_wkt(), "file") if crs is not None else (None, None)
    fallback = (rule.crs if rule else None) or (getattr(site_file, "crs", None) if site_file is not None else None)
    if crs_wkt is None and fallback:
        from pyproj import CRS

        crs_wkt, crs_source = CRS.from_user_input(fallback).to_wkt(), "site_file"
    variables = tuple(str(v) for v in ds.data_vars)
    stamp = time_from_name(name)
    if stamp is not None:
        zone = site_file.zone if site_file is not None else timezone.utc
        stamp = stamp.replace(tzinfo=zone).astimezone(timezone.utc)
    return GridProbe(
        path=name,
        format=fmt,
        crs_wkt=crs_wkt,
        crs_source=crs_source,
        shape=(int(ds.rio.height), int(ds.rio.width)),
        transform=tuple(float(v) for v in ds.rio.transform().to_gdal()),
        bounds=tuple(float(v) for v in ds.rio.bounds()),
        variables=variables,
        product=(rule.product if rule and rule.product else None) or guess_product(name, variables),
        time=stamp,
    )
