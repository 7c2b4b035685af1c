"""Footprint outlines: where a scan's points are, as a valid, small WGS84 polygon."""

from __future__ import annotations

import numpy as np
import pytest
import shapely
from affine import Affine
from pyproj import CRS, Transformer
from shapely.geometry import box, shape

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
