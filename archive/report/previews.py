"""PNG previews: hillshaded elevation of one epoch, and change maps centred on zero.

Rendered with matplotlib's Agg backend (no display needed, safe in dask workers). Elevation uses
the perceptually uniform ``cividis`` palette under a soft hillshade so relief reads at a glance;
change maps use a diverging red–blue palette with white at zero (red = lowering, blue =
raising) and limits set by the 98th percentile of |change| so a few outliers do not wash out
the map. Both carry a colour bar and a scale bar in ground units.
"""

from __future__ import annotations

import warnings

import io
import math

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402
import xarray as xr  # noqa: E402
from matplotlib.colors import LightSource, Normalize, TwoSlopeNorm  # noqa: E402

from archive.grids.binning import EpochGrid  # noqa: E402
from archive.grids.spec import GridSpec  # noqa: E402
from archive.storage import filesystem  # noqa: E402


def _nice_length(span: float) -> float:
    """A round scale-bar length (1, 2 or 5 × 10^k) near a fifth of the map width."""
    target = span / 5
    k = 10 ** math.floor(math.log10(target))
    return max(m * k for m in (1, 2, 5) if m * k <= target)


def _scale_bar(ax, extent: tuple[float, float, float, float], units: str) -> None:
    left, right, bottom, top = extent
    length = _nice_length(right - left)
    x0 = left + 0.05 * (right - left)
    y0 = bottom + 0.06 * (top - bottom)
    ax.plot([x0, x0 + length], [y0, y0], color="black", lw=4, solid_capstyle="butt")
    ax.plot([x0, x0 + length], [y0, y0], color="white", lw=2, solid_capstyle="butt")
    label = f"{length:g} {units}"
    ax.text(x0 + length / 2, y0 + 0.02 * (top - bottom), label, ha="center", va="bottom", fontsize=8,
            bbox={"facecolor": "white", "alpha": 0.7, "edgecolor": "none", "pad": 1})


def _save(fig, url: str, storage_options: dict | None) -> None:
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=100)
    plt.close(fig)
    fs, path = filesystem(url, storage_options)
    parent = path.rsplit("/", 1)[0] if "/" in path else ""
    if parent:
        fs.makedirs(parent, exist_ok=True)
    with fs.open(path + ".tmp", "wb") as f:
        f.write(buf.getvalue())
    fs.mv(path + ".tmp", path)


def _elevation_of(data, spec: GridSpec | None) -> tuple[np.ndarray, tuple[float, float, float, float], float]:
    """(elevation array north-up, extent (l, r, b, t), cell) from the accepted inputs."""
    if isinstance(data, EpochGrid):
        if spec is None:
            raise ValueError("render_preview of an EpochGrid needs its GridSpec (spec=...)")
        return data.elevation, (spec.x0, spec.x1, spec.y0, spec.y1), spec.cell
    if isinstance(data, xr.Dataset):
        data = data["elevation"]
    if "time" in data.dims:
        if data.sizes["time"] != 1:
            raise ValueError("render_preview draws one epoch: select it first, e.g. ds.isel(time=-1)")
        data = data.isel(time=0)
    return _array_extent(data)


def _array_extent(da: xr.DataArray) -> tuple[np.ndarray, tuple[float, float, float, float], float]:
    x, y = da["x"].values, da["y"].values
    cell = float(abs(x[1] - x[0])) if x.size > 1 else 1.0
    values = np.asarray(da.transpose("y", "x").values, dtype=np.float64)
    if y.size > 1 and y[1] > y[0]:  # south-up input: flip to north-up
        values, y = values[::-1], y[::-1]
    half = cell / 2
    return values, (x[0] - half, x[-1] + half, y[-1] - half, y[0] + half), cell


MAX_PIXELS = 640  # a preview is a quick look: larger grids are cropped to their data and block-averaged


def _quick_look(z: np.ndarray, extent: tuple[float, float, float, float], cell: float):
    """Crop to the cells that hold data, then average blocks so neither side exceeds MAX_PIXELS."""
    rows, cols = np.flatnonzero(np.isfinite(z).any(axis=1)), np.flatnonzero(np.isfinite(z).any(axis=0))
    if rows.size:
        left, top = extent[0] + cols[0] * cell, extent[3] - rows[0] * cell
        z = z[rows[0] : rows[-1] + 1, cols[0] : cols[-1] + 1]
        extent = (left, left + z.shape[1] * cell, top - z.shape[0] * cell, top)
    f = -(-max(z.shape) // MAX_PIXELS)
    if f > 1:
        ny, nx = -(-z.shape[0] // f) * f, -(-z.shape[1] // f) * f
        padded = np.full((ny, nx), np.nan)
        padded[: z.shape[0], : z.shape[1]] = z
        blocks = padded.reshape(ny // f, f, nx // f, f)
        with np.errstate(invalid="ignore"), warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)
            z = np.nanmean(blocks, axis=(1, 3))
        extent = (extent[0], extent[0] + nx * cell, extent[3] - ny * cell, extent[3])
        cell *= f
    return z, extent, cell


def render_preview(data, path: str, spec: GridSpec | None = None, title: str | None = None,
                   units: str = "m", storage_options: dict | None = None) -> None:
    """Hillshaded elevation of one epoch (EpochGrid + spec, Dataset or DataArray) as a PNG."""
    z, extent, cell = _quick_look(*_elevation_of(data, spec))
    valid = np.isfinite(z)
    fig, ax = plt.subplots(figsize=(6.4, 5.2))
    if valid.any():
        lo, hi = np.nanpercentile(z, [1, 99])
        norm = Normalize(lo, hi if hi > lo else lo + 1)
        filled = np.where(valid, z, np.nanmean(z))
        rgb = LightSource(azdeg=315, altdeg=40).shade(filled, cmap=plt.get_cmap("cividis"), norm=norm,
                                                    blend_mode="soft", dx=cell, dy=cell, vert_exag=1)
        rgb[..., 3] = valid
        ax.imshow(rgb, extent=extent, interpolation="nearest")
        sm = plt.cm.ScalarMappable(norm=norm, cmap="cividis")
        fig.colorbar(sm, ax=ax, shrink=0.85, label=f"elevation ({units})")
    else:
        ax.text(0.5, 0.5, "no points in this epoch", transform=ax.transAxes, ha="center")
    _finish(ax, fig, extent, title)
    _save(fig, path, storage_options)


def render_change(change, path: str, title: str | None = None, storage_options: dict | None = None) -> None:
    """A change map (ChangeResult or DataArray of metres) with colours centred on zero."""
    da = getattr(change, "change", change)
    if title is None and hasattr(change, "scan0"):
        title = f"{change.scan1} − {change.scan0}"
    d, extent, _ = _array_extent(da)
    fig, ax = plt.subplots(figsize=(6.4, 5.2))
    finite = d[np.isfinite(d)]
    limit = float(np.percentile(np.abs(finite), 98)) if finite.size else 1.0
    limit = limit if limit > 0 else 1.0
    im = ax.imshow(np.ma.masked_invalid(d), extent=extent, cmap="RdBu",
                   norm=TwoSlopeNorm(0.0, -limit, limit), interpolation="nearest")
    fig.colorbar(im, ax=ax, shrink=0.85, extend="both", label="elevation change (m)")
    if getattr(change, "stable_median", None) is not None:
        ax.text(0.99, 0.01, f"stable area: median {change.stable_median:+.3f} m, NMAD {change.stable_nmad:.3f} m",
                transform=ax.transAxes, ha="right", va="bottom", fontsize=7,
                bbox={"facecolor": "white", "alpha": 0.7, "edgecolor": "none"})
    _finish(ax, fig, extent, title)
    _save(fig, path, storage_options)


def _finish(ax, fig, extent, title: str | None) -> None:
    _scale_bar(ax, extent, "m")
    ax.set_xlim(extent[0], extent[1])
    ax.set_ylim(extent[2], extent[3])
    ax.set_xlabel("easting (m)")
    ax.set_ylabel("northing (m)")
    ax.ticklabel_format(useOffset=False, style="plain")
    ax.tick_params(labelsize=7)
    if title:
        ax.set_title(title, fontsize=10)
    fig.tight_layout()
