"""Map pictures drawn without a figure: the same colours as matplotlib, bars as tall as the map."""

from __future__ import annotations

import io

import matplotlib
import numpy as np
import pytest
import xarray as xr
from matplotlib.colors import LogNorm, Normalize
from PIL import Image

from archive.report import charts
from archive.report.raster import Scale, colorize, map_png


@pytest.mark.parametrize("name", ["cividis", "RdBu", "viridis"])
def test_colours_are_matplotlibs(name):
    rng = np.random.default_rng(7)
    values = np.concatenate([rng.uniform(-20, 120, 5000), [0.0, 100.0, -1e9, 1e9, 50.0]])
    got = colorize(values, Scale(name, 0.0, 100.0))
    # reference: matplotlib's own colormap and norm, as imshow would colour these values
    want = matplotlib.colormaps[name](Normalize(0.0, 100.0)(values), bytes=True)
    np.testing.assert_array_equal(got, want)


def test_log_colours_are_matplotlibs_and_nan_is_transparent():
    rng = np.random.default_rng(3)
    values = 10 ** rng.uniform(-1, 4, 4000)
    got = colorize(values, Scale("viridis", 0.5, 2000.0, log=True))
    want = matplotlib.colormaps["viridis"](LogNorm(0.5, 2000.0)(values), bytes=True)  # reference: matplotlib LogNorm
    # float rounding of log10 may move a value sitting on a bin edge to the next entry
    assert (np.abs(got.astype(int) - want.astype(int)).max(axis=1) > 0).mean() < 0.002
    nan = colorize(np.array([np.nan, 1.0]), Scale("viridis", 0.5, 2000.0, log=True))
    assert nan[0, 3] == 0 and nan[1, 3] == 255


def _decode(png: bytes) -> np.ndarray:
    with Image.open(io.BytesIO(png)) as im:  # reference: Pillow decodes the PNG
        assert im.format == "PNG"
        return np.asarray(im.convert("RGB"))


def test_a_uniform_map_shows_its_colour_and_a_bar_as_tall_as_the_map():
    scale = Scale("viridis", 0.0, 10.0, label="value")
    grid = np.full((30, 60), 2.5)
    img = _decode(map_png(colorize(grid, scale), (0.0, 600.0, 0.0, 300.0), scale, title="t"))
    colour = matplotlib.colormaps["viridis"](Normalize(0, 10)(2.5), bytes=True)[:3]  # reference: matplotlib
    is_map = np.all(img == colour, axis=2)
    rows = np.flatnonzero(is_map.sum(axis=1) > 100)  # the bar holds this colour too, in a few pixels
    cols = np.flatnonzero(is_map.sum(axis=0) > 100)
    assert cols.size > 500  # the 60 cells were scaled up to fill the picture's width
    # the colour bar: the column right of the map that runs through the palette, top to bottom
    lut = [tuple(c) for c in matplotlib.colormaps["viridis"](np.arange(256), bytes=True)[:, :3]]  # reference
    bar_col = next(c for c in range(cols[-1] + 1, img.shape[1])
                   if sum(tuple(p) in lut for p in img[:, c]) > 100)
    bar_rows = np.flatnonzero([tuple(p) in lut for p in img[:, bar_col]])
    assert tuple(img[bar_rows[0], bar_col]) in lut[-3:] and tuple(img[bar_rows[-1], bar_col]) in lut[:3]
    # as tall as the map, not taller
    assert abs(bar_rows[0] - rows[0]) <= 2 and abs(bar_rows[-1] - rows[-1]) <= 2


def _grid(values: np.ndarray, name: str) -> xr.DataArray:
    ny, nx = values.shape
    return xr.DataArray(values, dims=("y", "x"), name=name,
                        coords={"x": 500_000.5 + np.arange(nx), "y": 7_650_000.5 + np.arange(ny)[::-1]})


def test_density_is_not_a_pale_wash():
    rng = np.random.default_rng(11)
    counts = rng.integers(1, 20, size=(80, 120)).astype(float)
    counts[:3, :3] = 50_000  # a few cells beside the scanner hold most points
    img = _decode(charts.density_map(_grid(counts, "point_count"), "density"))
    lut = matplotlib.colormaps["viridis"](np.arange(256), bytes=True)[:, :3].astype(int)  # reference: matplotlib
    pixels = img.reshape(-1, 3).astype(int)
    index = np.abs(pixels[:, None, :] - lut[None, ::8, :]).sum(axis=2)
    on_palette = index.min(axis=1) < 12
    used = index.argmin(axis=1)[on_palette] * 8
    # the body of the map spreads over the palette instead of sitting at one end
    assert on_palette.mean() > 0.5
    assert 50 < np.median(used) < 206 and used.std() > 40


def test_maps_of_the_same_extent_have_the_same_size():
    rng = np.random.default_rng(5)
    elevation = _grid(rng.normal(100, 5, size=(50, 70)), "elevation")
    counts = _grid(rng.integers(1, 9, size=(50, 70)).astype(float), "point_count")
    a = _decode(charts.elevation_map(elevation, "e"))
    b = _decode(charts.density_map(counts, "d"))
    assert a.shape == b.shape


def test_coverage_chart_marks_partial_scans_and_shades_gaps():
    from datetime import datetime, timedelta, timezone

    from archive.report.health import Gap

    day = datetime(2026, 9, 1, 6, tzinfo=timezone.utc)
    times = [day, day + timedelta(days=1), day + timedelta(days=2), day + timedelta(days=8)]
    png = charts.coverage_chart(times, [40_000, 30_000, 35_000, 20_000], [False, True, False, False],
                                [Gap(times[2], times[3])], "north")
    img = _decode(png).astype(int)
    assert img.shape == (360, 960, 3)
    strip = img[45:95]  # the strip of one tick per scan

    def columns_near(rgb, rows):
        return np.flatnonzero((np.abs(rows - np.array(rgb)).sum(axis=2) < 60).any(axis=0))

    red = columns_near((0xA3, 0x3B, 0x2B), strip)
    teal = columns_near((0x2F, 0x6F, 0x73), strip)
    assert red.size and teal.size
    # reference: a linear time axis by hand: the partial scan (day 1 of 0..8) sits 1/8 of the way along
    first, last = teal.min(), teal.max()
    assert abs(red.mean() - (first + (last - first) / 8)) < 4
    # the gap (third to fourth scan) is shaded; the time between the first two scans is not
    gap_colour = np.array([0xD9, 0xA4, 0x41]) * 0.35 + 255 * 0.65
    middle = img[200, int(first + (last - first) * 0.6)]
    quiet = img[200, int(first + (last - first) * 0.06)]
    assert np.abs(middle - gap_colour).sum() < 12 and (quiet > 250).all()


def test_png_bytes_decode_to_the_pixels_drawn():
    from archive.report.raster import png_bytes

    rng = np.random.default_rng(23)
    rgb = rng.integers(0, 256, size=(37, 53, 3), dtype=np.uint8)
    rgb[10:20] = (12, 200, 99)  # a flat run, as maps have
    rgba = np.dstack([rgb, np.full(rgb.shape[:2], 255, np.uint8)])
    for image in (Image.fromarray(rgb), Image.fromarray(rgba, "RGBA")):
        png = png_bytes(image)
        with Image.open(io.BytesIO(png)) as im:  # reference: Pillow's PNG decoder
            im.load()
            assert (im.format, im.mode, im.size) == ("PNG", "RGB", (53, 37))
            np.testing.assert_array_equal(np.asarray(im), rgb)


@pytest.mark.parametrize("total", [False, True])
def test_block_means_of_a_big_grid_equal_scipy(total):
    from scipy.stats import binned_statistic_2d

    from archive.report.previews import _block_mean

    rng = np.random.default_rng(29)
    z = rng.normal(100, 20, size=(700, 1301)).astype(np.float32)
    z[rng.random(z.shape) < 0.6] = np.nan
    z[:30, :40] = np.nan  # whole blocks without data stay empty
    got, extent, cell = _block_mean(z, (0.0, 1301.0, 0.0, 700.0), 1.0, total=total)
    f = 3  # 1301 cells wide: blocks of 3 × 3 keep the picture within 640 pixels
    assert got.shape == (234, 434) and cell == f and extent == (0.0, 1302.0, -2.0, 700.0)
    rows, cols = np.nonzero(np.isfinite(z))
    # reference: scipy.stats.binned_statistic_2d over the finite cells, blocks of f × f from the top left
    want = binned_statistic_2d(rows + 0.5, cols + 0.5, z[rows, cols].astype(np.float64),
                               "sum" if total else "mean", bins=[np.arange(0, 703, f), np.arange(0, 1303, f)])
    counts = binned_statistic_2d(rows + 0.5, cols + 0.5, None, "count",
                                 bins=[np.arange(0, 703, f), np.arange(0, 1303, f)]).statistic
    expected = np.where(counts > 0, want.statistic, np.nan)
    assert np.isnan(got[:10, :13]).all()
    np.testing.assert_allclose(got, expected, rtol=2e-6)


def test_hillshade_is_matplotlibs_lightsource():
    from matplotlib.colors import LightSource

    from archive.report.previews import hillshade

    rng = np.random.default_rng(31)
    y, x = np.mgrid[0:90, 0:140]
    z = (40 * np.sin(x / 17.0) * np.cos(y / 11.0) + rng.normal(0, 0.5, x.shape)).astype(np.float32)
    got = hillshade(z, 0.5)
    # reference: matplotlib's LightSource, light from the north-west at 40 degrees
    want = LightSource(azdeg=315, altdeg=40).hillshade(z, vert_exag=1, dx=0.5, dy=0.5)
    np.testing.assert_allclose(got, want, rtol=0, atol=1e-12)
    assert got.min() == 0 and got.max() == 1 and got[:, :70].std() > 0.1


def test_a_preview_shows_matplotlibs_shaded_colours_cell_by_cell():
    from matplotlib.colors import LightSource

    from archive.report.previews import GridMap, preview_png
    from archive.report.raster import NO_DATA

    rng = np.random.default_rng(37)
    y, x = np.mgrid[0:60, 0:100]
    z = (30 + 8 * np.sin(x / 9.0) + 5 * np.cos(y / 7.0) + rng.normal(0, 0.3, x.shape)).astype(np.float32)
    z[:4, :] = np.nan  # a strip without points shows the no-data grey
    z[20:25, 40:48] = np.nan
    grid = GridMap(z, 600_000.5 + np.arange(100), 7_000_000.5 - np.arange(60))  # north-up, 1 m cells
    img = _decode(preview_png(grid, title="t", crop=False))
    # reference: matplotlib colours the percentile-stretched values (cividis, as its colormaps index
    # bytes) and shades them with LightSource soft light; empty cells are filled with the mean first
    valid = np.isfinite(z)
    lo, hi = np.nanpercentile(z.astype(np.float64), [1, 99])
    filled = np.where(valid, z.astype(np.float64), np.nanmean(z.astype(np.float64)))
    rgb = matplotlib.colormaps["cividis"](Normalize(lo, hi)(filled), bytes=True)[..., :3] / 255.0
    shaded = LightSource(azdeg=315, altdeg=40).shade_rgb(rgb, filled, blend_mode="soft", dx=1.0, dy=1.0)
    want = np.round(np.clip(shaded, 0, 1) * 255).astype(int)
    want[~valid] = NO_DATA
    # 100 × 60 cells fill the 600-pixel-wide map: 6 × 6 pixels each, below a 34-pixel title band
    centres = img[34 + 3 : 34 + 360 : 6, 12 + 3 : 12 + 600 : 6].astype(int)
    assert centres.shape == want.shape
    centres, want = centres[:54], want[:54]  # the scale bar covers the bottom rows
    assert np.abs(centres - want).max() <= 1  # rounding of the shade's last bits, no more
    assert (centres == want).all(axis=2).mean() > 0.999
