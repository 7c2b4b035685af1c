"""The health report's pictures, each returned as PNG bytes ready to embed in the page.

Maps reuse the preview renderers (one look for elevation and change across the shelf); the
coverage chart and the density map are drawn here. Agg backend: no display needed.
"""

from __future__ import annotations

import io
import os
import tempfile
from collections.abc import Callable, Sequence
from datetime import datetime

import matplotlib

matplotlib.use("Agg")
import matplotlib.dates as mdates
import matplotlib.pyplot as plt
import matplotlib.ticker as mticker
import numpy as np
import xarray as xr
from matplotlib.colors import LogNorm
from matplotlib.patches import Patch

from archive.report.health import Gap
from archive.report.previews import render_change, render_preview

INK = "#1f2a30"
SCAN = "#2f6f73"
PARTIAL = "#a33b2b"
GAP = "#d9a441"
MAX_CELLS = 640  # density maps larger than this are block-averaged for display


def _png(fig) -> bytes:
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=100)
    plt.close(fig)
    return buf.getvalue()


def _via_file(render: Callable[[str], None]) -> bytes:
    """Run a renderer that writes a PNG to a path, and return the bytes."""
    with tempfile.TemporaryDirectory(prefix="scanshelf-report-") as tmp:
        path = os.path.join(tmp, "figure.png")
        render(path)
        with open(path, "rb") as f:
            return f.read()


def coverage_chart(times: Sequence[datetime], points: Sequence[int], partial: Sequence[bool],
                   gaps: Sequence[Gap], title: str) -> bytes:
    """Scans over time (top strip) and points per scan (stems below), gaps shaded in both."""
    t = np.array([np.datetime64(x.replace(tzinfo=None), "us") for x in times])
    n = np.asarray(points, dtype=float)
    bad = np.asarray(partial, dtype=bool)
    fig, (strip, bars) = plt.subplots(2, 1, figsize=(9.6, 3.6), sharex=True,
                                      gridspec_kw={"height_ratios": [1, 3], "hspace": 0.08})
    for ax in (strip, bars):
        for g in gaps:
            ax.axvspan(np.datetime64(g.start.replace(tzinfo=None)), np.datetime64(g.end.replace(tzinfo=None)),
                       color=GAP, alpha=0.35, lw=0)
        ax.spines[["top", "right"]].set_visible(False)
        ax.tick_params(labelsize=8, colors=INK)
    strip.vlines(t[~bad], 0, 1, color=SCAN, lw=1.5)
    strip.vlines(t[bad], 0, 1, color=PARTIAL, lw=1.5)
    strip.set_ylim(0, 1)
    strip.set_yticks([])
    strip.set_title(title, fontsize=10, color=INK, loc="left")
    markers, stems, _ = bars.stem(t, n, basefmt=" ")
    plt.setp(stems, color=SCAN, lw=1)
    plt.setp(markers, color=SCAN, markersize=3)
    if bad.any():
        bars.plot(t[bad], n[bad], "o", color=PARTIAL, markersize=4)
    bars.set_ylabel("points per scan", fontsize=8, color=INK)
    bars.set_ylim(0, max(1.0, float(n.max()) * 1.1) if n.size else 1.0)
    bars.yaxis.set_major_formatter(mticker.EngFormatter(sep=""))
    if t.size == 1:  # one scan: give the axis a day either side so the stem is not on an edge
        bars.set_xlim(t[0] - np.timedelta64(1, "D"), t[0] + np.timedelta64(1, "D"))
    locator = mdates.AutoDateLocator(minticks=3, maxticks=8)  # default minticks=5 leaves 3.5–5 day spans untickable
    bars.xaxis.set_major_locator(locator)
    bars.xaxis.set_major_formatter(mdates.ConciseDateFormatter(locator))
    handles = [Patch(color=SCAN, label="scan"), Patch(color=GAP, alpha=0.5, label="gap")]
    if bad.any():
        handles.insert(1, Patch(color=PARTIAL, label="partial scan"))
    bars.margins(x=0.03)
    fig.legend(handles=handles, fontsize=7, frameon=False, loc="upper right", ncol=len(handles))
    fig.subplots_adjust(left=0.08, right=0.98, top=0.9, bottom=0.13)
    return _png(fig)


def elevation_map(elevation: xr.DataArray, title: str) -> bytes:
    """One epoch's elevation, hillshaded, as the shelf's previews draw it."""
    return _via_file(lambda path: render_preview(elevation, path, title=title))


def change_map(change, title: str) -> bytes:
    """A ChangeResult as the shelf's change previews draw it (red lowering, blue raising)."""
    return _via_file(lambda path: render_change(change, path, title=title))


def density_map(point_count: xr.DataArray, title: str) -> bytes:
    """Points per square metre of one epoch, cropped to the cells that hold points, log colours."""
    x = point_count["x"].values
    cell = float(abs(x[1] - x[0])) if x.size > 1 else 1.0
    counts = point_count.transpose("y", "x").astype("float64")
    counts = counts.where(counts > 0)
    rows = np.flatnonzero(counts.notnull().any("x").values)
    cols = np.flatnonzero(counts.notnull().any("y").values)
    fig, ax = plt.subplots(figsize=(6.4, 5.2))
    if rows.size:
        counts = counts.isel(y=slice(rows[0], rows[-1] + 1), x=slice(cols[0], cols[-1] + 1))
        factor = -(-max(counts.shape) // MAX_CELLS)
        if factor > 1:
            counts = counts.coarsen(x=factor, y=factor, boundary="pad").mean()
        density = counts / cell**2
        xs, ys = density["x"].values, density["y"].values
        step = cell * max(factor, 1)
        extent = (xs.min() - step / 2, xs.max() + step / 2, ys.min() - step / 2, ys.max() + step / 2)
        values = density.values if ys[0] > ys[-1] else density.values[::-1]
        lo, hi = np.nanmin(values), np.nanmax(values)
        im = ax.imshow(np.ma.masked_invalid(values), extent=extent, cmap="YlGnBu",
                       norm=LogNorm(lo, hi if hi > lo else lo * 10), interpolation="nearest")
        fig.colorbar(im, ax=ax, shrink=0.85, label="points per m²")
        ax.set_xlabel("easting (m)")
        ax.set_ylabel("northing (m)")
        ax.ticklabel_format(useOffset=False, style="plain")
    else:
        ax.text(0.5, 0.5, "no points in this epoch", transform=ax.transAxes, ha="center")
    ax.tick_params(labelsize=7)
    ax.set_title(title, fontsize=10)
    fig.subplots_adjust(left=0.15, right=0.95, bottom=0.1, top=0.92)  # fixed: tight_layout is slow
    return _png(fig)
