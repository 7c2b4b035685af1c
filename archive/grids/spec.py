"""A station's fixed grid: the one frame every epoch of that station is binned into.

Fixing origin, cell and extent per station (instead of per scan) is what makes epochs align
cell for cell, so a DEM difference is a plain subtraction.
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass

import numpy as np
from affine import Affine

from archive.layout import check_station


# The largest station grid built: 4096 × 4096 cells. Binning holds three 8-byte sums per cell
# (~400 MB) and the cube three 4-byte layers per epoch; a station whose scans would need more
# (scans from different places in one folder, or a cell far too small) is not gridded.
MAX_CELLS = 4096 * 4096


def overlapping_groups(boxes: list[tuple[float, float, float, float]], gap: float = 0.0) -> list[list[int]]:
    """Indices of (xmin, ymin, xmax, ymax) boxes grouped by overlap (boxes closer than ``gap`` touch),
    transitively; groups and their members in input order.

    One station folder may hold scans from different places: gridding them together would span
    the distance between them, so each group of overlapping scans is judged on its own.
    """
    b = np.asarray(boxes, dtype=np.float64).reshape(-1, 4)
    parent = list(range(len(b)))

    def root(i: int) -> int:
        while parent[i] != i:
            parent[i] = parent[parent[i]]
            i = parent[i]
        return i

    for i in range(len(b)):
        near = np.flatnonzero(
            (b[i + 1 :, 0] <= b[i, 2] + gap) & (b[i + 1 :, 2] >= b[i, 0] - gap)
            & (b[i + 1 :, 1] <= b[i, 3] + gap) & (b[i + 1 :, 3] >= b[i, 1] - gap)
        ) + i + 1
        for j in near:
            parent[root(int(j))] = root(i)
    groups: dict[int, list[int]] = {}
    for i in range(len(b)):
        groups.setdefault(root(i), []).append(i)
    return sorted(groups.values(), key=lambda g: g[0])


@dataclass(frozen=True)
class GridSpec:
    """North-up grid: lower-left corner (x0, y0), square cells of ``cell`` metres, nx × ny cells."""

    station: str
    crs_wkt: str
    x0: float
    y0: float
    cell: float
    nx: int
    ny: int

    def __post_init__(self) -> None:
        check_station(self.station)
        if not (self.cell > 0 and math.isfinite(self.cell)):
            raise ValueError(f"grid cell size must be a positive number of metres, got {self.cell!r}")
        if self.nx < 1 or self.ny < 1:
            raise ValueError(f"grid of station {self.station!r} is empty ({self.nx} × {self.ny} cells)")

    @classmethod
    def from_bounds(
        cls,
        station: str,
        bounds: tuple[float, float, float, float],
        cell: float = 1.0,
        margin: float = 10.0,
        crs_wkt: str = "",
    ) -> "GridSpec":
        """Grow (xmin, ymin, xmax, ymax) by ``margin`` and snap outwards to whole cells.

        Snapping the corner to multiples of the cell size keeps grids of neighbouring stations
        (and re-derived grids of the same station) on one lattice.
        """
        xmin, ymin, xmax, ymax = (float(b) for b in bounds)
        if not all(map(math.isfinite, (xmin, ymin, xmax, ymax))) or xmax < xmin or ymax < ymin:
            raise ValueError(f"station {station!r}: bounds {bounds!r} are not a box (xmin, ymin, xmax, ymax)")
        x0 = math.floor((xmin - margin) / cell) * cell
        y0 = math.floor((ymin - margin) / cell) * cell
        nx = max(1, math.ceil((xmax + margin - x0) / cell))
        ny = max(1, math.ceil((ymax + margin - y0) / cell))
        # a point exactly on the far edge belongs to the next cell: keep it inside
        nx += (x0 + nx * cell) <= xmax
        ny += (y0 + ny * cell) <= ymax
        return cls(station, crs_wkt, x0, y0, float(cell), int(nx), int(ny))

    @property
    def cells(self) -> int:
        return self.nx * self.ny

    def overlaps(self, bounds: tuple[float, ...]) -> bool:
        """Whether a scan's (xmin, ymin, ..., xmax, ymax, ...) box touches the grid."""
        xmin, ymin, xmax, ymax = (bounds[0], bounds[1], bounds[3], bounds[4]) if len(bounds) == 6 else bounds
        return xmin <= self.x1 and xmax >= self.x0 and ymin <= self.y1 and ymax >= self.y0

    @property
    def y1(self) -> float:
        """Top edge."""
        return self.y0 + self.ny * self.cell

    @property
    def x1(self) -> float:
        return self.x0 + self.nx * self.cell

    @property
    def bounds(self) -> tuple[float, float, float, float]:
        return (self.x0, self.y0, self.x1, self.y1)

    @property
    def transform(self) -> Affine:
        """GDAL-style affine from (col, row) of the upper-left corner; north-up."""
        return Affine(self.cell, 0.0, self.x0, 0.0, -self.cell, self.y1)

    @property
    def x(self) -> np.ndarray:
        """Cell-centre eastings, west to east."""
        return self.x0 + (np.arange(self.nx) + 0.5) * self.cell

    @property
    def y(self) -> np.ndarray:
        """Cell-centre northings, north to south (row 0 is the top row)."""
        return self.y1 - (np.arange(self.ny) + 0.5) * self.cell

    def to_dict(self) -> dict:
        return asdict(self)

    @classmethod
    def from_dict(cls, d: dict) -> "GridSpec":
        return cls(
            str(d["station"]), str(d["crs_wkt"]), float(d["x0"]), float(d["y0"]),
            float(d["cell"]), int(d["nx"]), int(d["ny"]),
        )
