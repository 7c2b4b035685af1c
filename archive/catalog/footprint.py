"""Where a scan's points are, as a small WGS84 polygon for its STAC Item.

A terrestrial scan covers an irregular fan, so its bbox overstates the area a lot. Migrate keeps
a coarse occupancy mask per scan while streaming points; here the occupied cells are traced
into polygons, small gaps closed, holes dropped, the outline simplified to a few hundred
vertices at most, and reprojected to WGS84 (GeoJSON requires longitude/latitude).
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
import shapely
from affine import Affine
from pyproj import CRS, Transformer
from rasterio import features
from shapely.geometry import MultiPolygon, Polygon, mapping, shape

MAX_VERTICES = 300


def outline(mask: np.ndarray, transform: Affine | Sequence[float], crs_wkt: str) -> dict:
    """GeoJSON geometry (WGS84) of the occupied cells of ``mask``.

    ``mask`` is a north-up boolean array (ny, nx); ``transform`` maps (col, row) to native
    coordinates, as an ``affine.Affine`` or its six coefficients (a, b, c, d, e, f).
    """
    mask = np.asarray(mask, dtype=bool)
    if mask.ndim != 2 or not mask.any():
        raise ValueError("footprint mask must be a 2-D boolean array with at least one cell set")
    tf = transform if isinstance(transform, Affine) else Affine(*transform[:6])
    native = _native_outline(mask, tf)
    to_wgs84 = Transformer.from_crs(CRS.from_wkt(crs_wkt), CRS.from_epsg(4326), always_xy=True)
    geom = shapely.transform(native, lambda xy: np.column_stack(to_wgs84.transform(xy[:, 0], xy[:, 1])))
    geom = shapely.make_valid(shapely.set_precision(geom, 1e-9))
    return mapping(_polygonal(geom))


def _native_outline(mask: np.ndarray, tf: Affine) -> Polygon | MultiPolygon:
    """Trace cells, close one-cell gaps, drop holes, simplify until the vertex budget holds."""
    cell = max(abs(tf.a), abs(tf.e))
    parts = [shape(g) for g, _ in features.shapes(mask.astype(np.uint8), mask=mask, transform=tf)]
    geom = shapely.union_all(parts)
    # A closing (grow then shrink by one cell) joins points separated by an empty cell
    # without inflating the outer edge; mitre joins keep the cell corners square.
    geom = geom.buffer(cell, join_style="mitre").buffer(-cell, join_style="mitre")
    geom = _drop_holes(_polygonal(geom))
    tolerance = cell / 2
    simple = geom.simplify(tolerance)
    while shapely.get_num_coordinates(simple) > MAX_VERTICES:
        tolerance *= 2
        simple = geom.simplify(tolerance)
    simple = _polygonal(shapely.make_valid(simple))
    return simple if not simple.is_empty else geom


def _drop_holes(geom: Polygon | MultiPolygon) -> Polygon | MultiPolygon:
    """Holes (occluded shadows inside the fan) add vertices but do not help a search."""
    polys = [Polygon(p.exterior) for p in getattr(geom, "geoms", [geom])]
    return polys[0] if len(polys) == 1 else MultiPolygon(polys)


def _polygonal(geom) -> Polygon | MultiPolygon:
    """Keep only the areal parts (make_valid and buffers can leave lines and points)."""
    polys = list(_iter_polys(geom))
    if not polys:
        return Polygon()
    return polys[0] if len(polys) == 1 else MultiPolygon(polys)


def _iter_polys(geom):
    for g in getattr(geom, "geoms", [geom]):
        if isinstance(g, Polygon) and not g.is_empty:
            yield g
        elif hasattr(g, "geoms"):
            yield from _iter_polys(g)
