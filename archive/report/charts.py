"""The health report's pictures, each returned as PNG bytes ready to embed in the page.

Everything is drawn with Pillow, without a plotting figure (importing matplotlib's figure
machinery alone costs half a CPU-second per run): maps straight from the grids like the
previews (archive.report.raster: one look for elevation, density and change across the shelf),
the coverage chart with matplotlib's date ticks and labels.
"""

from __future__ import annotations

from collections.abc import Sequence
from datetime import datetime
from typing import TYPE_CHECKING

import matplotlib.dates as mdates
import matplotlib.ticker as mticker
import numpy as np
from PIL import Image, ImageDraw

from archive.report.health import Gap
from archive.report.previews import _array_extent, _block_mean, _crop, _double, change_png, preview_png
from archive.report.raster import Scale, colorize, font, map_png, png_bytes

if TYPE_CHECKING:
    import xarray as xr

    from archive.report.previews import GridMap

INK = "#1f2a30"
SCAN = "#2f6f73"
PARTIAL = "#a33b2b"
GAP = "#d9a441"


WIDTH, HEIGHT, SS = 960, 360, 2  # chart size in pixels; drawn at SS× and reduced, for smooth edges


def _rgb(hex_colour: str, alpha: float = 1.0) -> tuple[int, int, int]:
    """A colour over white paper at ``alpha``."""
    c = [int(hex_colour[i : i + 2], 16) for i in (1, 3, 5)]
    return tuple(round(alpha * v + (1 - alpha) * 255) for v in c)  # type: ignore[return-value]


def coverage_chart(times: Sequence[datetime], points: Sequence[int], partial: Sequence[bool],
                   gaps: Sequence[Gap], title: str) -> bytes:
    """Scans over time (top strip) and points per scan (stems below), gaps shaded in both.

    Drawn with Pillow at twice the size and averaged down (smooth edges); the date ticks and their
    labels are matplotlib's own (AutoDateLocator, ConciseDateFormatter), without a figure.
    """
    t = np.array([mdates.date2num(x.replace(tzinfo=None)) for x in times], dtype=float)
    n = np.asarray(points, dtype=float)
    bad = np.asarray(partial, dtype=bool)
    if t.size == 0:
        t0, t1 = mdates.date2num(datetime(2000, 1, 1)) - 1, mdates.date2num(datetime(2000, 1, 1)) + 1
    elif t.size == 1 or t.max() == t.min():  # one time: a day either side so the stem is not on an edge
        t0, t1 = t.min() - 1, t.max() + 1
    else:
        pad = 0.03 * (t.max() - t.min())
        t0, t1 = t.min() - pad, t.max() + pad
    top = max(1.0, float(n.max()) * 1.1) if n.size else 1.0
    locator = mdates.AutoDateLocator(minticks=3, maxticks=8)  # default minticks=5 leaves 3.5–5 day spans untickable
    xticks = [v for v in locator.tick_values(mdates.num2date(t0), mdates.num2date(t1)) if t0 <= v <= t1]
    formatter = mdates.ConciseDateFormatter(locator)
    xlabels = formatter.format_ticks(xticks) if xticks else []
    yticks = [v for v in mticker.MaxNLocator(5).tick_values(0, top) if 0 <= v <= top]
    # plain text, said outright: left to the rc settings, the formatter loads the font manager (30 ms)
    eng = mticker.EngFormatter(sep="", usetex=False, useMathText=False)

    img = Image.new("RGB", (WIDTH * SS, HEIGHT * SS), "white")
    d = ImageDraw.Draw(img)
    small, big = font(11 * SS), font(14 * SS)
    left, right = 78 * SS, (WIDTH - 18) * SS
    strip = (36 * SS, 102 * SS)
    bars = (112 * SS, 312 * SS)

    def x_of(v: float) -> float:
        return left + (v - t0) / (t1 - t0) * (right - left)

    def y_of(v: float) -> float:
        return bars[1] - v / top * (bars[1] - bars[0])

    ink, soft = _rgb(INK), _rgb("#5b676d")
    for g in gaps:
        a = x_of(mdates.date2num(g.start.replace(tzinfo=None)))
        b = x_of(mdates.date2num(g.end.replace(tzinfo=None)))
        for lo, hi in (strip, bars):
            d.rectangle((max(a, left), lo, min(b, right), hi), fill=_rgb(GAP, 0.35))
    for v, is_bad in zip(t, bad):
        x = x_of(v)
        d.line((x, strip[0], x, strip[1]), fill=_rgb(PARTIAL if is_bad else SCAN), width=int(1.5 * SS))
    for v, count, is_bad in zip(t, n, bad):
        x, y = x_of(v), y_of(count)
        d.line((x, bars[1], x, y), fill=_rgb(SCAN), width=SS)
        r = (4 if is_bad else 3) * SS / 2 + SS / 2
        d.ellipse((x - r, y - r, x + r, y + r), fill=_rgb(PARTIAL if is_bad else SCAN))
    for lo, hi in (strip, bars):  # axes: left and bottom spines, as a plain chart has them
        d.line((left, hi, right, hi), fill=ink, width=SS)
        d.line((left, lo, left, hi), fill=ink, width=SS)
    for v, label in zip(xticks, xlabels):
        x = x_of(v)
        for hi in (strip[1], bars[1]):
            d.line((x, hi, x, hi + 4 * SS), fill=ink, width=SS)
        d.text((x, bars[1] + 7 * SS), label, fill=ink, font=small, anchor="ma")
    offset = formatter.get_offset() if xticks else ""
    if offset:
        d.text((right, bars[1] + 24 * SS), offset, fill=ink, font=big, anchor="ra")
    for v in yticks:
        y = y_of(v)
        d.line((left - 4 * SS, y, left, y), fill=ink, width=SS)
        d.text((left - 7 * SS, y), eng.format_eng(v) if v else "0", fill=ink, font=small, anchor="rm")
    label = Image.new("RGB", (int(d.textlength("points per scan", font=small)) + 4, 16 * SS), "white")
    ImageDraw.Draw(label).text((2, 0), "points per scan", fill=ink, font=small)
    label = label.rotate(90, expand=True)
    img.paste(label, (12 * SS, (bars[0] + bars[1]) // 2 - label.height // 2))
    d.text((left, 12 * SS), title, fill=ink, font=big)
    legend = [("scan", _rgb(SCAN))] + ([("partial scan", _rgb(PARTIAL))] if bad.any() else []) + [("gap", _rgb(GAP, 0.5))]
    x = right
    for name, colour in reversed(legend):
        w = d.textlength(name, font=small)
        x -= w
        d.text((x, 14 * SS), name, fill=ink, font=small)
        x -= 22 * SS
        d.rectangle((x, 15 * SS, x + 16 * SS, 23 * SS), fill=colour)
        x -= 14 * SS
    # each pixel the mean of its SS × SS samples: supersampling's own filter, a tenth of the
    # time of a Lanczos resize and the same look (edges differ by a few levels, no overshoot)
    return png_bytes(img.reduce(SS))


def elevation_map(elevation: xr.DataArray | GridMap, title: str, crop: bool = True) -> bytes:
    """One epoch's elevation, hillshaded, as the shelf's previews draw it."""
    return preview_png(elevation, title=title, crop=crop)


def change_map(change, title: str, crop: bool = False) -> bytes:
    """A ChangeResult as the shelf's change previews draw it (red lowering, blue raising)."""
    return change_png(change, title, crop=crop)


def density_map(point_count: xr.DataArray | GridMap, title: str, crop: bool = True) -> bytes:
    """Points per square metre of one epoch, log colours stretched between the 2nd and 98th
    percentiles: a few very dense cells next to the scanner no longer push the rest of the map
    into one end of the palette. A grid too big to show cell by cell shows the points per m² of
    each block of cells, empty cells included."""
    counts, extent, cell = _array_extent(point_count)
    held = counts > 0
    if crop:
        counts, held, extent = _crop(counts, held, extent, cell)
    # a big grid: points per block; empty cells and blocks NaN
    counts, extent, block = _block_mean(counts, extent, cell, total=True, held=held)
    counts = _double(counts)
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
