"""Legacy grid products as labs keep them: GeoTIFF, NetCDF and ESRI ASCII DEMs, velocity
grids and a strain-rate grid, one in a foreign CRS and one without any CRS.

Values come from the site model, so a test can check a cell against ``site.surface``.
"""

from __future__ import annotations

import os
import tempfile
from datetime import datetime, timezone
from pathlib import Path

import numpy as np
import pyproj
import rasterio
import rioxarray  # noqa: F401  (registers the .rio accessor used on datasets)
import xarray as xr
from rasterio.transform import Affine

from archive.demo import site
from archive.demo.writers import atomic

CELL = 5.0  # m
NODATA = -9999.0
_U = (-1200.0, 300.0)  # local extent of the products (m)
_V = (-550.0, 550.0)
FOREIGN_CRS = "EPSG:32632"  # WGS 84 / UTM zone 32N, a neighbouring zone


def _iso(t: float) -> str:
    return datetime.fromtimestamp(t, timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ")


def site_grid() -> tuple[Affine, int, int]:
    """Transform and shape of the products' grid in the site CRS."""
    x0, y_top = site.to_utm(np.float64(_U[0]), np.float64(_V[1]))
    cols = int((_U[1] - _U[0]) / CELL)
    rows = int((_V[1] - _V[0]) / CELL)
    return Affine(CELL, 0.0, float(x0), 0.0, -CELL, float(y_top)), rows, cols


def _centres(transform: Affine, rows: int, cols: int) -> tuple[np.ndarray, np.ndarray]:
    c, r = np.meshgrid(np.arange(cols) + 0.5, np.arange(rows) + 0.5)
    x = transform.c + c * transform.a
    y = transform.f + r * transform.e
    return x, y


def dem(transform: Affine, rows: int, cols: int, t: float) -> np.ndarray:
    """Surface elevation at time ``t`` on the grid; open water is nodata (no laser return)."""
    x, y = _centres(transform, rows, cols)
    u, v = site.to_local(x, y)
    z, cls = site.surface(u.ravel(), v.ravel(), t)
    z = np.where(cls == site.WATER, NODATA, z)
    return z.reshape(rows, cols).astype(np.float32)


def _velocity(u: np.ndarray, v: np.ndarray) -> np.ndarray:
    vx, vy, vz = site.velocity(u, v)
    return np.stack([vx, vy, vz]).astype(np.float32)


def _truth(path: str, fmt: str, station: str, product: str, crs: str | None, transform: Affine,
           shape: tuple[int, int], variables: list[str], units: dict, times: dict, **more) -> dict:
    return {
        "path": path,
        "format": fmt,
        "station": station,
        "product": product,
        "crs": crs,
        "shape": list(shape),
        "transform": [transform.a, transform.b, transform.c, transform.d, transform.e, transform.f],
        "variables": variables,
        "units": units,
        "nodata": NODATA,
        "dtype": "float32",
        **times,
        "needs_site_file": [] if crs else ["crs"],
        "sidecars": [],
        **more,
    }


def write_geotiff(path: Path, bands: np.ndarray, transform: Affine, crs: str | None,
                  names: list[str], units: str, tags: dict) -> None:
    with atomic(path) as tmp:
        with rasterio.open(
            tmp, "w", driver="GTiff", height=bands.shape[1], width=bands.shape[2], count=bands.shape[0],
            dtype="float32", crs=crs, transform=transform, nodata=NODATA, compress="deflate",
        ) as out:
            out.write(bands)
            for i, name in enumerate(names, start=1):
                out.set_band_description(i, name)
                out.set_band_unit(i, units)
            out.update_tags(**tags)


def write_netcdf(path: Path, variables: dict[str, np.ndarray], transform: Affine, crs: str,
                 attrs: dict[str, dict], global_attrs: dict) -> None:
    rows, cols = next(iter(variables.values())).shape
    x, y = _centres(transform, rows, cols)
    ds = xr.Dataset(
        {name: (("y", "x"), data, attrs[name]) for name, data in variables.items()},
        coords={"x": ("x", x[0], {"units": "m", "standard_name": "projection_x_coordinate"}),
                "y": ("y", y[:, 0], {"units": "m", "standard_name": "projection_y_coordinate"})},
        attrs=global_attrs,
    )
    ds = ds.rio.write_crs(crs).rio.write_coordinate_system()
    # keep rioxarray's CF grid_mapping link, which it records in each variable's encoding
    encoding = {name: {**ds[name].encoding, "_FillValue": np.float32(NODATA), "dtype": "float32"} for name in variables}
    with atomic(path) as tmp:
        ds.to_netcdf(tmp, engine="h5netcdf", encoding=encoding)


def write_ascii_grid(path: Path, data: np.ndarray, transform: Affine, crs: str) -> Path:
    """ESRI ASCII grid with its .prj; both are renamed into place together."""
    prj = path.with_suffix(".prj")
    path.parent.mkdir(parents=True, exist_ok=True)
    with tempfile.TemporaryDirectory(dir=path.parent, prefix=".grid-") as tmpdir:
        tmp = Path(tmpdir) / "grid.asc"
        with rasterio.open(tmp, "w", driver="AAIGrid", height=data.shape[0], width=data.shape[1], count=1,
                           dtype="float32", crs=crs, transform=transform, nodata=NODATA,
                           DECIMAL_PRECISION=3) as out:
            out.write(data, 1)
        os.replace(tmp.with_suffix(".prj"), prj)
        os.replace(tmp, path)
    return prj


def write_products(source: Path, times: dict[str, list[float]]) -> list[dict]:
    """Write every legacy grid under ``<station>/products/`` and return their truth records."""
    transform, rows, cols = site_grid()
    out: list[dict] = []
    x, y = _centres(transform, rows, cols)
    u, v = site.to_local(x, y)
    vel = _velocity(u.ravel(), v.ravel()).reshape(3, rows, cols)
    vel_units = "m d-1"
    names = ["vx", "vy", "vz"]
    comps = {"vx": "eastward", "vy": "northward", "vz": "upward"}
    if "north" in times:
        t0, t1 = times["north"][0], times["north"][-1]
        rel = f"north/products/DEM_{datetime.fromtimestamp(t0, timezone.utc):%Y%m%d}.tif"
        write_geotiff(source / rel, dem(transform, rows, cols, t0)[None], transform, site.SITE_CRS,
                      ["elevation"], "m", {"TIFFTAG_DATETIME": _iso(t0).replace("-", ":").replace("T", " ")[:19]})
        out.append(_truth(rel, "geotiff", "north", "dem", site.SITE_CRS, transform, (rows, cols),
                          ["elevation"], {"elevation": "m"}, {"time": _iso(t0)}))

        rel = f"north/products/dem_{datetime.fromtimestamp(t1, timezone.utc):%Y%m%d}.nc"
        write_netcdf(source / rel, {"elevation": dem(transform, rows, cols, t1)}, transform, site.SITE_CRS,
                     {"elevation": {"units": "m", "long_name": "surface elevation", "standard_name": "surface_altitude"}},
                     {"title": "Quillmere front DEM (demo)", "time_coverage_start": _iso(t1), "Conventions": "CF-1.8"})
        out.append(_truth(rel, "netcdf", "north", "dem", site.SITE_CRS, transform, (rows, cols),
                          ["elevation"], {"elevation": "m"}, {"time": _iso(t1)}))

        rel = (f"north/products/displacement_{datetime.fromtimestamp(t0, timezone.utc):%Y%m%d}_"
               f"{datetime.fromtimestamp(t1, timezone.utc):%Y%m%d}.tif")
        write_geotiff(source / rel, vel, transform, site.SITE_CRS, names, vel_units,
                      {"start_time": _iso(t0), "end_time": _iso(t1)})
        out.append(_truth(rel, "geotiff", "north", "displacement", site.SITE_CRS, transform, (rows, cols),
                          names, {n: vel_units for n in names}, {"start": _iso(t0), "end": _iso(t1)}))
    if "south" in times:
        ts = times["south"]
        tm = ts[len(ts) // 2]
        rel = f"south/products/dem {datetime.fromtimestamp(tm, timezone.utc):%Y%m%d}.asc"
        prj = write_ascii_grid(source / rel, dem(transform, rows, cols, tm), transform, site.SITE_CRS)
        rec = _truth(rel, "aaigrid", "south", "dem", site.SITE_CRS, transform, (rows, cols),
                     ["elevation"], {"elevation": "m"}, {"time": _iso(tm)}, crs_source=".prj")
        rec["sidecars"] = [prj.relative_to(source).as_posix()]
        out.append(rec)

        # the same velocity field delivered in a neighbouring UTM zone, components rotated
        t_foreign, frows, fcols, fvel = _foreign_velocity(transform, rows, cols)
        rel = "south/products/velocity_utm32.nc"
        write_netcdf(source / rel, dict(zip(names, fvel)), t_foreign, FOREIGN_CRS,
                     {n: {"units": vel_units, "long_name": f"{comps[n]} surface velocity"} for n in names},
                     {"title": "Quillmere surface velocity (demo)", "time_coverage_start": _iso(ts[0]),
                      "time_coverage_end": _iso(ts[-1]), "Conventions": "CF-1.8"})
        out.append(_truth(rel, "netcdf", "south", "displacement", FOREIGN_CRS, t_foreign, (frows, fcols),
                          names, {n: vel_units for n in names}, {"start": _iso(ts[0]), "end": _iso(ts[-1])}))

        # along-flow strain rate, written without any CRS (a lost .prj, an old tool)
        strain = np.gradient(vel[0].astype(np.float64), CELL, axis=1).astype(np.float32)
        rel = "south/products/strain_rate.tif"
        write_geotiff(source / rel, strain[None], transform, None, ["strain_rate_xx"], "d-1",
                      {"start_time": _iso(ts[0]), "end_time": _iso(ts[-1])})
        out.append(_truth(rel, "geotiff", "south", "strain_rate", None, transform, (rows, cols),
                          ["strain_rate_xx"], {"strain_rate_xx": "d-1"}, {"start": _iso(ts[0]), "end": _iso(ts[-1])},
                          intended_crs=site.SITE_CRS))
    return out


def _foreign_velocity(transform: Affine, rows: int, cols: int) -> tuple[Affine, int, int, np.ndarray]:
    """Velocity on a grid of the foreign CRS, with east/north components of that CRS's axes."""
    to_foreign = pyproj.Transformer.from_crs(site.SITE_CRS, FOREIGN_CRS, always_xy=True)
    to_site = pyproj.Transformer.from_crs(FOREIGN_CRS, site.SITE_CRS, always_xy=True)
    xs = np.array([transform.c, transform.c + cols * CELL] * 2)
    ys = np.array([transform.f] * 2 + [transform.f - rows * CELL] * 2)
    fx, fy = to_foreign.transform(xs, ys)
    x0, x1 = np.floor(fx.min() / CELL) * CELL, np.ceil(fx.max() / CELL) * CELL
    y0, y1 = np.floor(fy.min() / CELL) * CELL, np.ceil(fy.max() / CELL) * CELL
    ftransform = Affine(CELL, 0.0, float(x0), 0.0, -CELL, float(y1))
    frows, fcols = int(round((y1 - y0) / CELL)), int(round((x1 - x0) / CELL))
    gx, gy = _centres(ftransform, frows, fcols)
    sx, sy = to_site.transform(gx.ravel(), gy.ravel())
    u, v = site.to_local(sx, sy)
    vx, vy, vz = _velocity(u, v).astype(np.float64)
    # Jacobian of the site → foreign mapping, by finite differences of 1 m
    ex, ey = to_foreign.transform(sx + 1.0, sy)
    nx, ny = to_foreign.transform(sx, sy + 1.0)
    fvx = (ex - gx.ravel()) * vx + (nx - gx.ravel()) * vy
    fvy = (ey - gy.ravel()) * vx + (ny - gy.ravel()) * vy
    outside = (u < _U[0]) | (u > _U[1]) | (v < _V[0]) | (v > _V[1])
    fvel = np.stack([fvx, fvy, vz])
    fvel[:, outside] = NODATA
    return ftransform, frows, fcols, fvel.reshape(3, frows, fcols).astype(np.float32)
