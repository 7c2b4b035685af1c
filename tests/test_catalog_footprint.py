"""Footprint outlines: where a scan's points are, as a valid, small WGS84 polygon."""

from __future__ import annotations

import numpy as np
import pytest
import shapely
from affine import Affine
from hypothesis import example, given, settings
from hypothesis import strategies as st
from pyproj import CRS, Transformer
from scipy import ndimage
from shapely.geometry import box, shape

from archive.catalog import footprint
from archive.catalog.footprint import MAX_VERTICES, outline

WKT = CRS.from_epsg(32633).to_wkt()
TF = Affine(2.0, 0, 500000.0, 0, -2.0, 7650200.0)  # 2 m cells, north-up


def _bbox_wgs84(mask: np.ndarray) -> tuple[float, float, float, float]:
    ny, nx = mask.shape
    to = Transformer.from_crs(32633, 4326, always_xy=True)  # reference: pyproj
    return to.transform_bounds(TF.c, TF.f + TF.e * ny, TF.c + TF.a * nx, TF.f, densify_pts=21)


def test_l_shape_is_inside_bbox_and_much_smaller() -> None:
    mask = np.zeros((100, 100), bool)
    mask[:, :20] = True  # west leg
    mask[80:, :] = True  # south leg
    geom = shape(outline(mask, TF, WKT))
    bb = box(*_bbox_wgs84(mask))
    assert geom.is_valid and geom.geom_type == "Polygon"  # reference: shapely validity (OGC)
    assert bb.buffer(1e-9).contains(geom)
    assert geom.area / bb.area == pytest.approx(0.36, abs=0.02)  # the L fills 36 % of its box


def test_sparse_noisy_mask_stays_within_vertex_budget() -> None:
    rng = np.random.default_rng(4)
    yy, xx = np.mgrid[:300, :300]
    fan = (np.hypot(xx - 150, yy) < 280) & (np.abs(xx - 150) < yy)  # a scanner's fan
    mask = fan & (rng.random(fan.shape) > 0.3)
    geom = shape(outline(mask, TF, WKT))
    n = len(geom.exterior.coords) if geom.geom_type == "Polygon" else sum(len(p.exterior.coords) for p in geom.geoms)
    assert 4 <= n <= MAX_VERTICES + 5
    assert geom.is_valid
    assert not getattr(geom, "interiors", [])  # holes are dropped
    fan_area = shape(outline(fan, TF, WKT)).area
    assert geom.area == pytest.approx(fan_area, rel=0.1)  # gaps of one cell are closed


def test_empty_mask_is_refused() -> None:
    with pytest.raises(ValueError, match="at least one cell"):
        outline(np.zeros((5, 5), bool), TF, WKT)


def test_scattered_specks_do_not_break_the_budget() -> None:
    rng = np.random.default_rng(5)
    block = np.zeros((400, 400), bool)
    block[150:250, 150:250] = True  # the scanned slope
    mask = block.copy()
    mask[rng.integers(0, 400, 3000), rng.integers(0, 400, 3000)] = True  # isolated stray returns
    geom = shape(outline(mask, TF, WKT))
    assert geom.is_valid and shapely.get_num_coordinates(geom) <= MAX_VERTICES
    # specks are dropped or merged: the outline stays close to the slope itself
    assert geom.area == pytest.approx(shape(outline(block, TF, WKT)).area, rel=0.25)


# The raster steps of an outline are numpy code that must give exactly scipy.ndimage's arrays.


def _scipy_close(mask: np.ndarray) -> np.ndarray:
    # reference: scipy.ndimage.binary_closing, on the mask padded with one empty cell, cropped back
    return ndimage.binary_closing(np.pad(mask, 1), structure=np.ones((3, 3), bool))[1:-1, 1:-1]


def _spiral(n: int, wall: int, gap: int) -> np.ndarray:
    """A square spiral of walls: the empty corridor inside winds many times before it reaches out."""
    mask = np.zeros((n, n), bool)
    top, left, bottom, right = 0, 0, n - 1, n - 1
    while top <= bottom and left <= right:
        mask[top : top + wall, left : right + 1] = True
        mask[top : bottom + 1, right - wall + 1 : right + 1] = True
        mask[bottom - wall + 1 : bottom + 1, left : right + 1] = True
        mask[top + wall + gap : bottom + 1, left : left + wall] = True
        top, left, bottom, right = top + wall + gap, left + wall + gap, bottom - wall - gap, right - wall - gap
    return mask


@st.composite
def _masks(draw) -> np.ndarray:
    """Noise, nested rectangles (holes in islands in holes, some touching the edge) and spirals."""
    ny, nx = draw(st.integers(1, 40)), draw(st.integers(1, 40))
    seed = draw(st.integers(0, 2**32 - 1))
    rng = np.random.default_rng(seed)
    kind = draw(st.sampled_from(["noise", "rectangles", "spiral"]))
    if kind == "noise":
        return rng.random((ny, nx)) < draw(st.floats(0.0, 1.0))
    if kind == "spiral":
        n = max(ny, nx)
        mask = _spiral(n, draw(st.integers(1, 3)), draw(st.integers(1, 3)))
        mask = np.rot90(mask, draw(st.integers(0, 3)))[:ny, :nx]  # cropped: some corridors open at the edge
        return mask ^ (rng.random(mask.shape) < draw(st.sampled_from([0.0, 0.02])))  # a few breaches
    mask = np.zeros((ny, nx), bool)
    for _ in range(draw(st.integers(1, 8))):  # each rectangle toggles: rings, islands inside rings
        y0, x0 = rng.integers(-2, ny), rng.integers(-2, nx)
        h, w = rng.integers(1, ny + 3), rng.integers(1, nx + 3)
        mask[max(y0, 0) : max(y0 + h, 0), max(x0, 0) : max(x0 + w, 0)] ^= True
    return mask


@given(_masks())
@settings(max_examples=400, deadline=None)
@example(np.zeros((1, 1), bool))
@example(np.ones((1, 1), bool))
@example(np.pad(np.ones((3, 3), bool), 1) ^ np.pad(np.pad(np.ones((1, 1), bool), 1), 1))  # a ring: its hole fills
@example(_spiral(23, 1, 1))
def test_closing_and_hole_filling_match_scipy(mask: np.ndarray) -> None:
    assert np.array_equal(footprint._close(mask), _scipy_close(mask))
    # reference: scipy.ndimage.binary_fill_holes (4-connected background for 2-D)
    assert np.array_equal(footprint._fill_holes(mask), ndimage.binary_fill_holes(mask))


def test_hole_filling_sees_four_connectivity_only() -> None:
    mask = np.ones((5, 5), bool)
    mask[1:4, 1:4] = False
    mask[2, 2] = True
    mask[0, 0] = False  # the corner touches the hole at (1, 1) only diagonally
    filled = footprint._fill_holes(mask)
    assert filled[1:4, 1:4].all() and not filled[0, 0]


def test_spiral_corridor_open_to_the_edge_is_not_filled() -> None:
    mask = _spiral(61, 1, 1)
    mask[30, 0] = False  # breach the outer wall: the whole corridor now reaches the outside
    filled = footprint._fill_holes(mask)
    expected = ndimage.binary_fill_holes(mask)  # reference: scipy.ndimage.binary_fill_holes
    assert np.array_equal(filled, expected)
    assert np.count_nonzero(filled) < np.count_nonzero(ndimage.binary_fill_holes(_spiral(61, 1, 1)))


def _fan(n: int, seed: int, keep: float) -> np.ndarray:
    rng = np.random.default_rng(seed)
    yy, xx = np.mgrid[:n, :n]
    fan = (np.hypot(xx - n / 2, yy) < 0.94 * n) & (np.abs(xx - n / 2) < yy)
    return fan & (rng.random(fan.shape) < keep)


def _island_in_lake(n: int) -> np.ndarray:
    mask = np.zeros((n, n), bool)
    mask[:, : n // 2] = True  # touches three edges
    mask[n // 4 : 3 * n // 4, n // 8 : 3 * n // 8] = False  # a lake...
    mask[3 * n // 8 : 5 * n // 8, n // 5 : 3 * n // 10] = True  # ...with an island
    mask[n // 10, 3 * n // 4 :] = True  # a one-cell-wide line to the east edge
    return mask


@pytest.mark.parametrize(
    "mask",
    [_fan(256, 4, 0.7), _fan(120, 9, 0.35), _island_in_lake(90), _spiral(64, 1, 2), _spiral(50, 2, 1)],
    ids=["fan-256", "thin-fan", "island-in-lake", "spiral", "thick-spiral"],
)
def test_outline_is_the_one_traced_from_scipy_rasters(mask: np.ndarray, monkeypatch) -> None:
    ours = outline(mask, TF, WKT)
    # reference: scipy.ndimage for the raster steps, the rest of the outline as it is
    monkeypatch.setattr(footprint, "_close", lambda m: _scipy_close(m) | m)
    monkeypatch.setattr(footprint, "_fill_holes", ndimage.binary_fill_holes)
    assert ours == outline(mask, TF, WKT)


@given(_masks())
@settings(max_examples=200, deadline=None)
@example(np.eye(5, dtype=bool))  # cells that touch only at corners
@example(_island_in_lake(30))
def test_cells_polygon_equals_rasterio_trace(mask: np.ndarray) -> None:
    from rasterio import features

    if not mask.any():
        assert footprint.cells_polygon(mask, TF).is_empty
        return
    # reference: rasterio.features.shapes (GDAL's polygonize of the cell edges), united by shapely
    traced = shapely.union_all([shape(g) for g, _ in features.shapes(mask.astype(np.uint8), mask=mask, transform=TF)])
    ours = footprint.cells_polygon(mask, TF)
    assert ours.equals(traced)  # the same point set (vertices may differ by collinear points)
    assert ours.area == pytest.approx(np.count_nonzero(mask) * abs(TF.a * TF.e), rel=1e-12)
