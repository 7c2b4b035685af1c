"""PNG previews: hillshaded elevation of one epoch, and change maps centred on zero.

Drawn straight from the grid (archive.report.raster), without a plotting figure: safe in dask
workers and cheap enough to draw one per scan. Elevation uses the perceptually uniform
``cividis`` palette between the 1st and 99th percentiles under a soft hillshade so relief reads
at a glance; change maps use the diverging red–blue palette (``RdBu``) with white at zero
(red = lowering, blue = raising) and limits at the 98th percentile of |change| so a few outliers
do not wash out the map. Both carry a colour bar as tall as the map and a scale bar.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np

from archive.grids.binning import EpochGrid
from archive.grids.spec import GridSpec
from archive.report.raster import Scale, colorize, map_png
from archive.storage import filesystem

if TYPE_CHECKING:
    import xarray as xr


@dataclass(frozen=True)
class GridMap:
    """One 2-D map on a grid's cell centres: ``values`` (y, x) and the ``x``, ``y`` coordinates.

    What a picture needs from a cube, read through zarr alone: migrate and the shelf's page
    draw maps without importing xarray and dask (about 0.4 CPU-second per process)."""

    values: np.ndarray
    x: np.ndarray
    y: np.ndarray


def _save(png: bytes, url: str, storage_options: dict | None) -> None:
    fs, path = filesystem(url, storage_options)
    parent = path.rsplit("/", 1)[0] if "/" in path else ""
    if parent:
        fs.makedirs(parent, exist_ok=True)
    with fs.open(path + ".tmp", "wb") as f:
        f.write(png)
    fs.mv(path + ".tmp", path)


def _elevation_of(data, spec: GridSpec | None) -> tuple[np.ndarray, tuple[float, float, float, float], float]:
    """(elevation array north-up, extent (l, r, b, t), cell) from the accepted inputs."""
    if isinstance(data, EpochGrid):
        if spec is None:
            raise ValueError("render_preview of an EpochGrid needs its GridSpec (spec=...)")
        return data.elevation, (spec.x0, spec.x1, spec.y0, spec.y1), spec.cell
    if isinstance(data, GridMap):
        return _array_extent(data)
    import xarray as xr  # already loaded by whoever made the Dataset or DataArray

    if isinstance(data, xr.Dataset):
        data = data["elevation"]
    if "time" in data.dims:
        if data.sizes["time"] != 1:
            raise ValueError("render_preview draws one epoch: select it first, e.g. ds.isel(time=-1)")
        data = data.isel(time=0)
    return _array_extent(data)


def _array_extent(da: xr.DataArray | GridMap) -> tuple[np.ndarray, tuple[float, float, float, float], float]:
    """(values north-up, extent (l, r, b, t), cell). Values keep the type the cube stores
    (float32 elevations, integer counts): block means add them in float32 anyway, and pictures
    small enough to show cell by cell are drawn in double precision (:func:`_double`)."""
    if isinstance(da, GridMap):
        x, y, values = da.x, da.y, np.asarray(da.values)
    else:
        x, y = da["x"].values, da["y"].values
        values = np.asarray(da.transpose("y", "x").values)
    cell = float(abs(x[1] - x[0])) if x.size > 1 else 1.0
    if y.size > 1 and y[1] > y[0]:  # south-up input: flip to north-up
        values, y = values[::-1], y[::-1]
    half = cell / 2
    return values, (x[0] - half, x[-1] + half, y[-1] - half, y[0] + half), cell


def _double(z: np.ndarray) -> np.ndarray:
    """A map from a cube in double precision, once cropped and block-averaged: cheaper than
    converting the whole cube, and the same values."""
    return z.astype(np.float64, copy=False)


MAX_PIXELS = 640  # a preview is a quick look: larger grids are block-averaged to at most this a side


def _block_mean(z: np.ndarray, extent: tuple[float, float, float, float], cell: float, total: bool = False,
                held: np.ndarray | None = None):
    """Average (or with ``total``, add up) blocks of cells, cells without data (NaN, or not
    ``held``) ignored, so neither side exceeds MAX_PIXELS; a block or cell without data is NaN.
    Single precision: these are display values."""
    f = -(-max(z.shape) // MAX_PIXELS)
    if f <= 1:
        return (z if held is None else np.where(held, z, np.nan)), extent, cell
    h, w = z.shape
    ny, nx = -(-h // f), -(-w // f)
    finite = np.isfinite(z) if held is None else held
    values = np.zeros((ny * f, nx * f), np.float32)  # padded to whole blocks with empty cells
    np.copyto(values[:h, :w], z, where=finite, casting="same_kind")
    held = np.zeros((ny * f, nx * f), np.uint8)
    held[:h, :w] = finite
    # a block's rows, then its columns, added slice by slice: the row sums are float32 in row
    # order (as a sum over that axis adds them), the column sums exact in float64; slices run
    # several times faster than sums over a short axis of a reshaped view
    sums, count = values[0::f].copy(), held[0::f].astype(np.uint16)
    for k in range(1, f):
        sums += values[k::f]
        count += held[k::f]
    block_sums, block_count = sums[:, 0::f].astype(np.float64), count[:, 0::f].copy()
    for k in range(1, f):
        block_sums += sums[:, k::f]
        block_count += count[:, k::f]
    with np.errstate(invalid="ignore", divide="ignore"):
        z = np.where(block_count > 0, block_sums if total else block_sums / block_count, np.nan)
    return z, (extent[0], extent[0] + nx * f * cell, extent[3] - ny * f * cell, extent[3]), cell * f


def _crop(z: np.ndarray, held: np.ndarray, extent: tuple[float, float, float, float], cell: float):
    """(z, held, extent) cropped to the rows and columns with data: the mask comes along, so the
    block means need not test the cells again."""
    rows, cols = np.flatnonzero(held.any(axis=1)), np.flatnonzero(held.any(axis=0))
    if not rows.size:
        return z, held, extent
    left, top = extent[0] + cols[0] * cell, extent[3] - rows[0] * cell
    window = slice(rows[0], rows[-1] + 1), slice(cols[0], cols[-1] + 1)
    z = z[window]
    return z, held[window], (left, left + z.shape[1] * cell, top - z.shape[0] * cell, top)


def hillshade(z: np.ndarray, cell: float, azimuth: float = 315.0, altitude: float = 40.0) -> np.ndarray:
    """Illumination (0 to 1, stretched to the full range) of a north-up surface lit from
    ``azimuth`` (degrees from north; 315 is the north-west that map readers expect) at
    ``altitude`` degrees: the steps of matplotlib's ``LightSource.hillshade``, with the product
    of the unit normals and the light written out instead of its BLAS call, which cost as much
    as all the rest and whose last bits vary with the machine's BLAS kernels."""
    e_dy, e_dx = np.gradient(z, -cell, cell)  # rows run south
    nx, ny = np.negative(e_dx, dtype=np.float64), np.negative(e_dy, dtype=np.float64)
    length = np.sqrt(nx * nx + ny * ny + 1.0)
    az, alt = np.radians(90 - azimuth), np.radians(altitude)
    light = (np.cos(az) * np.cos(alt), np.sin(az) * np.cos(alt), np.sin(alt))
    intensity = nx / length * light[0] + ny / length * light[1] + 1.0 / length * light[2]
    low, high = intensity.min(), intensity.max()
    if high - low > 1e-6:
        intensity -= low
        intensity /= high - low
    return np.clip(intensity, 0, 1, out=intensity)


def preview_png(data, spec: GridSpec | None = None, title: str | None = None, units: str = "m",
                crop: bool = True) -> bytes:
    """Hillshaded elevation of one epoch (EpochGrid + spec, GridMap, Dataset or DataArray) as PNG bytes.

    ``crop=False`` keeps the given extent (the health page crops all maps of a station alike).
    """
    z, extent, cell = _elevation_of(data, spec)
    held = np.isfinite(z)
    if crop:
        z, held, extent = _crop(z, held, extent, cell)
    z, extent, cell = _block_mean(z, extent, cell, held=held)
    if not isinstance(data, EpochGrid):
        z = _double(z)
    valid = np.isfinite(z)
    if not valid.any():
        return map_png(np.zeros((*z.shape, 4), np.uint8), extent, None, title=title, units=units,
                       note="no points in this epoch")
    lo, hi = (float(v) for v in np.nanpercentile(z, [1, 99]))
    scale = Scale("cividis", lo, hi if hi > lo else lo + 1, label=f"elevation ({units})")
    filled = np.where(valid, z, np.nanmean(z))
    rgb = colorize(filled, scale)[..., :3] / 255.0
    # soft-light blend ("pegtop", as matplotlib's): 2 L rgb + (1 - 2 L) rgb², in place
    light = hillshade(filled, cell)[..., np.newaxis]
    light *= 2
    shaded = light * rgb
    np.subtract(1, light, out=light)
    np.multiply(rgb, rgb, out=rgb)
    rgb *= light
    shaded += rgb
    np.clip(shaded, 0, 1, out=shaded)
    shaded *= 255
    rgba = np.empty((*z.shape, 4), np.uint8)
    rgba[..., :3] = np.round(shaded, out=shaded)
    rgba[..., 3] = np.where(valid, 255, 0)
    return map_png(rgba, extent, scale, title=title, units=units)


def render_preview(data, path: str, spec: GridSpec | None = None, title: str | None = None,
                   units: str = "m", storage_options: dict | None = None) -> None:
    """Hillshaded elevation of one epoch (EpochGrid + spec, Dataset or DataArray) as a PNG file."""
    _save(preview_png(data, spec, title, units), path, storage_options)


def change_png(change, title: str | None = None, crop: bool = False) -> bytes:
    """A change map (ChangeResult, GridMap or DataArray of metres) with colours centred on zero, as PNG bytes."""
    da = getattr(change, "change", change)
    if title is None and hasattr(change, "scan0"):
        title = f"{change.scan1} − {change.scan0}"
    d, extent, cell = _array_extent(da)
    held = np.isfinite(d)
    if crop:
        d, held, extent = _crop(d, held, extent, cell)
    d, extent, cell = _block_mean(d, extent, cell, held=held)
    d = _double(d)
    finite = d[np.isfinite(d)]
    limit = float(np.percentile(np.abs(finite), 98)) if finite.size else 1.0
    limit = limit if limit > 0 else 1.0
    scale = Scale("RdBu", -limit, limit, label="elevation change (m)")
    note = None
    if getattr(change, "stable_median", None) is not None:
        note = f"stable area: median {change.stable_median:+.3f} m, NMAD {change.stable_nmad:.3f} m"
    return map_png(colorize(d, scale), extent, scale, title=title, note=note, extend=(True, True))


def render_change(change, path: str, title: str | None = None, storage_options: dict | None = None) -> None:
    """A change map (ChangeResult or DataArray of metres) with colours centred on zero, as a PNG file."""
    _save(change_png(change, title), path, storage_options)
