"""The health report's pictures, each returned as PNG bytes ready to embed in the page.

Maps are drawn straight from the grids like the previews (archive.report.raster: one look for
elevation, density and change across the shelf, no figure per map). The coverage chart is a
real chart (dates, stems, legend), drawn on one matplotlib Figure with the Agg canvas and
without pyplot, whose import alone costs most of a second.
"""

from __future__ import annotations

import io
from collections.abc import Sequence
from datetime import datetime

import matplotlib.dates as mdates
import matplotlib.ticker as mticker
import numpy as np
import xarray as xr
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure
from matplotlib.patches import Patch

from archive.report.health import Gap
from archive.report.previews import _array_extent, _block_mean, change_png, crop_to_data, preview_png
from archive.report.raster import Scale, colorize, map_png

INK = "#1f2a30"
SCAN = "#2f6f73"
PARTIAL = "#a33b2b"
GAP = "#d9a441"


def _png(fig: Figure) -> bytes:
    buf = io.BytesIO()
    FigureCanvasAgg(fig).print_png(buf)
    return buf.getvalue()


def coverage_chart(times: Sequence[datetime], points: Sequence[int], partial: Sequence[bool],
                   gaps: Sequence[Gap], title: str) -> bytes:
    """Scans over time (top strip) and points per scan (stems below), gaps shaded in both."""
    t = np.array([np.datetime64(x.replace(tzinfo=None), "us") for x in times])
    n = np.asarray(points, dtype=float)
    bad = np.asarray(partial, dtype=bool)
    fig = Figure(figsize=(9.6, 3.6), dpi=100)
    strip, bars = fig.subplots(2, 1, sharex=True, gridspec_kw={"height_ratios": [1, 3], "hspace": 0.08})
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
    stems.set(color=SCAN, lw=1)
    markers.set(color=SCAN, markersize=3)
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


def elevation_map(elevation: xr.DataArray, title: str, crop: bool = True) -> bytes:
    """One epoch's elevation, hillshaded, as the shelf's previews draw it."""
    return preview_png(elevation, title=title, crop=crop)


def change_map(change, title: str, crop: bool = False) -> bytes:
    """A ChangeResult as the shelf's change previews draw it (red lowering, blue raising)."""
    return change_png(change, title, crop=crop)


def density_map(point_count: xr.DataArray, title: str, crop: bool = True) -> bytes:
    """Points per square metre of one epoch, log colours stretched between the 2nd and 98th
    percentiles: a few very dense cells next to the scanner no longer push the rest of the map
    into one end of the palette. A grid too big to show cell by cell shows the points per m² of
    each block of cells, empty cells included."""
    counts, extent, cell = _array_extent(point_count)
    counts = np.where(counts > 0, counts, np.nan)
    if crop:
        counts, extent = crop_to_data(counts, extent, cell)
    counts, extent, block = _block_mean(counts, extent, cell, total=True)  # a big grid: points per block
    density = counts / (block * block)
    finite = density[np.isfinite(density)]
    if not finite.size:
        return map_png(np.zeros((*density.shape, 4), np.uint8), extent, None, title=title,
                       note="no points in this epoch")
    lo, hi = (float(v) for v in np.percentile(finite, [2, 98]))
    hi = hi if hi > lo else lo * 10
    scale = Scale("viridis", lo, hi, log=True, label="points per m²")
    return map_png(colorize(density, scale), extent, scale, title=title,
                   extend=(bool(finite.min() < lo), bool(finite.max() > hi)))
