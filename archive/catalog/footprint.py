"""Where a scan's points are, as a small WGS84 polygon for its STAC Item.

A terrestrial scan covers an irregular fan, so its bbox overstates the area a lot. Migrate keeps
a coarse occupancy mask per scan while streaming points; here one-cell gaps are closed and
holes filled on that raster, the occupied cells traced into polygons, the outline simplified to
a few hundred vertices at most, and reprojected to WGS84 (GeoJSON requires longitude/latitude).
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
import shapely
from affine import Affine
from pyproj import CRS, Transformer
from rasterio import features
from scipy import ndimage
from shapely.geometry import MultiPolygon, Polygon, mapping, shape

MAX_VERTICES = 300
MAX_PARTS = 20
MIN_PART_SHARE = 0.005


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
    """Close one-cell gaps and fill holes on the raster, trace, simplify to the vertex budget.

    Working on the raster first keeps tracing cheap: a sparse far field would otherwise trace
    into tens of thousands of single-cell polygons.
    """
    cell = max(abs(tf.a), abs(tf.e))
    padded = np.pad(mask, 1)  # so the closing does not treat the array edge as occupied
    closed = ndimage.binary_closing(padded, structure=np.ones((3, 3), bool))[1:-1, 1:-1] | mask
    filled = ndimage.binary_fill_holes(closed)  # occluded shadows inside the fan do not help a search
    parts = [shape(g) for g, _ in features.shapes(filled.astype(np.uint8), mask=filled, transform=tf)]
    geom = _main_parts(_drop_holes(_polygonal(shapely.union_all(parts))))
    tolerance = cell / 2
    for _ in range(30):
        simple = _polygonal(shapely.make_valid(geom.simplify(tolerance)))
        if not simple.is_empty and shapely.get_num_coordinates(simple) <= MAX_VERTICES:
            return simple
        tolerance *= 2
    return geom.convex_hull.simplify(cell)  # last resort; a hull is never too detailed to search


def _main_parts(geom: Polygon | MultiPolygon) -> Polygon | MultiPolygon:
    """Drop specks (stray returns far from the rest) so that many parts cannot break the budget.

    Keeps the largest parts, at most MAX_PARTS, and of those only the ones holding at least
    MIN_PART_SHARE of the area.
    """
    polys = sorted(getattr(geom, "geoms", [geom]), key=lambda p: p.area, reverse=True)
    total = sum(p.area for p in polys)
    keep = [p for p in polys[:MAX_PARTS] if p.area >= MIN_PART_SHARE * total] or polys[:1]
    return keep[0] if len(keep) == 1 else MultiPolygon(keep)


def _drop_holes(geom: Polygon | MultiPolygon) -> Polygon | MultiPolygon:
    """Outer rings only (a union of touching cells can still leave a ring between parts)."""
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
