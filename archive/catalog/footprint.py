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
import shapely.affinity
from affine import Affine
from pyproj import CRS, Transformer
from shapely.geometry import MultiPolygon, Polygon, mapping

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
    closed = _close(mask)
    filled = _fill_holes(closed)  # occluded shadows inside the fan do not help a search
    geom = _main_parts(_drop_holes(_polygonal(cells_polygon(filled, tf))))
    tolerance = cell / 2
    for _ in range(30):
        simple = _polygonal(shapely.make_valid(geom.simplify(tolerance)))
        if not simple.is_empty and shapely.get_num_coordinates(simple) <= MAX_VERTICES:
            return simple
        tolerance *= 2
    return geom.convex_hull.simplify(cell)  # last resort; a hull is never too detailed to search


def cells_polygon(mask: np.ndarray, tf: Affine) -> Polygon | MultiPolygon:
    """The union of the set cells of ``mask`` as polygons whose edges are cell edges.

    Each row's runs of set cells become boxes, united by GEOS: the same area that tracing the
    raster's cell edges gives, without importing rasterio (and the GDAL start-up and boto3 it
    brings: 0.2 CPU-s of every migrate process) for the one trace per scan.
    """
    edges = np.diff(np.pad(mask, ((0, 0), (1, 1))).view(np.int8), axis=1)  # +1 where a run starts, -1 after it ends
    rows, starts = np.nonzero(edges == 1)
    _, ends = np.nonzero(edges == -1)  # row-major, as the starts: the i-th end closes the i-th run
    cells = shapely.union_all(shapely.box(starts, rows, ends, rows + 1))
    return shapely.affinity.affine_transform(cells, [tf.a, tf.b, tf.d, tf.e, tf.c, tf.f])  # (col, row) -> native


def _close(mask: np.ndarray) -> np.ndarray:
    """Closing with a 3×3 square, outside the array counted as empty: one-cell gaps are filled.

    Dilation then erosion, each as two separable passes of three shifts; the array edge is not
    treated as occupied, so every set cell stays set. Numpy instead of scipy.ndimage, whose
    import cost every migrate process about a third of a CPU-second.
    """
    grown = _spread(np.pad(mask, 2), np.logical_or)  # one cell larger on each side than mask
    return _spread(grown, np.logical_and)  # mask's shape: erosion where the grown array reaches


def _spread(a: np.ndarray, op: np.ufunc) -> np.ndarray:
    """``op`` over each cell's 3×3 neighbourhood, for the cells whose neighbourhood lies inside ``a``."""
    rows = op(op(a[:-2], a[1:-1]), a[2:])
    return op(op(rows[:, :-2], rows[:, 1:-1]), rows[:, 2:])


def _fill_holes(mask: np.ndarray) -> np.ndarray:
    """``mask`` plus the empty cells that no 4-connected path of empty cells joins to the array edge.

    Runs of empty cells along rows are joined where they touch the row below by union-find on
    index arrays (hook each root onto the smaller root across a joint, then jump pointers to
    the roots), so a spiral costs a few passes, not one pass per cell of its length as a flood
    fill by repeated dilation would.
    """
    empty = ~np.pad(mask, 1)  # a ring of empty cells: the outside, which every edge cell touches
    flat = empty.ravel()
    # runs in reading order; the ring joins each row's end to the next row's start, both outside
    starts = flat & ~np.concatenate([[False], flat[:-1]])
    run = (np.cumsum(starts) - 1).reshape(empty.shape)
    joint = empty[:-1] & empty[1:]
    a, b = run[:-1][joint], run[1:][joint]
    parent = np.arange(np.count_nonzero(starts))
    while True:
        ra, rb = parent[a], parent[b]
        apart = ra != rb
        if not apart.any():
            break
        ra, rb = ra[apart], rb[apart]
        parent[np.maximum(ra, rb)] = np.minimum(ra, rb)  # roots point to smaller runs: no cycles
        while True:
            jumped = parent[parent]
            if np.array_equal(jumped, parent):
                break
            parent = jumped
        a, b = a[apart], b[apart]
    outside = empty & (parent[run] == 0)  # run 0 starts at a corner of the ring
    return ~outside[1:-1, 1:-1]


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
