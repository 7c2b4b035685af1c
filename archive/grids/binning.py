"""Streaming binning of points onto a station grid: mean, spread and count per cell.

Memory is three float64/int64 grids, whatever the scan's size: each chunk of points is reduced
with ``np.bincount`` into running count, sum and sum of squares of the block of cells it spans
(a chunk in Hilbert order spans a small block, so its cost follows its points, not the grid). The sums are taken of
``z - z_ref`` (``z_ref`` = mean z of the first chunk), which removes the large common offset of
elevations (hundreds to thousands of metres) before squaring. The remaining cancellation error
of the variance is about 2e-16 × (local relief from z_ref)²: below 1e-9 m² for 1 km of relief,
far under the float32 resolution the grids are stored at.

Cells are half-open ``[x0 + i·cell, x0 + (i+1)·cell)`` on both axes (the convention of
``numpy.histogram2d``/``scipy.stats.binned_statistic_2d``, except that they close their last
bin; here a point on the east or north edge is outside); row 0 is the northernmost row.
``elevation_std`` is the population standard deviation (ddof = 0) of the points in the cell.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from archive.grids.spec import GridSpec


@dataclass
class EpochGrid:
    """One scan binned onto its station grid (row 0 = north)."""

    elevation: np.ndarray  # float32 (ny, nx), NaN where no points
    elevation_std: np.ndarray  # float32 (ny, nx), NaN where no points
    point_count: np.ndarray  # uint32 (ny, nx)
    outside: int  # points that fell outside the grid (kept in the points archive, not gridded)

    @property
    def inside(self) -> int:
        return int(self.point_count.sum(dtype=np.int64))


class GridAccumulator:
    """Add points chunk by chunk with :meth:`add`, then :meth:`finish` for the epoch grids."""

    def __init__(self, spec: GridSpec):
        self.spec = spec
        self._count = np.zeros((spec.ny, spec.nx), np.int64)  # row 0 = north
        self._sum = np.zeros((spec.ny, spec.nx), np.float64)
        self._sumsq = np.zeros((spec.ny, spec.nx), np.float64)
        self._ref: float | None = None
        self.outside = 0

    def add(self, x: np.ndarray, y: np.ndarray, z: np.ndarray) -> None:
        """Bin one chunk of float64 coordinates (finite, validated upstream).

        The sums are taken over the block of cells the chunk's inside points span, not the whole
        grid: migrate feeds row groups in Hilbert order, so a chunk covers a compact block and a
        4096 × 4096 grid is not allocated and added three times per chunk. Per cell, the points
        are summed in the same order as a whole-grid ``np.bincount``, so the result is the same
        to the bit.
        """
        if self._count is None:
            raise RuntimeError("GridAccumulator.add() after finish(): start a new accumulator")
        s = self.spec
        fx = np.subtract(x, s.x0)
        fx /= s.cell
        fy = np.subtract(y, s.y0)
        fy /= s.cell
        if fx.size == 0:
            return
        # floor(f) >= 0 iff f >= 0 and floor(f) < n iff f < n (n whole): the range test needs no
        # floor, and for the inside points (f >= 0) truncation to int is the floor
        lo_x, hi_x, lo_y, hi_y = fx.min(), fx.max(), fy.min(), fy.max()
        if not (lo_x >= 0 and hi_x < s.nx and lo_y >= 0 and hi_y < s.ny):
            inside = (fx >= 0) & (fx < s.nx) & (fy >= 0) & (fy < s.ny)  # NaN compares False: outside
            fx, fy, z = fx[inside], fy[inside], z[inside]
            self.outside += int(inside.size - fx.size)
            if fx.size == 0:
                return
            lo_x, hi_x, lo_y, hi_y = fx.min(), fx.max(), fy.min(), fy.max()
        c0, c1 = int(lo_x), int(hi_x) + 1  # columns [c0, c1) of the block
        r0, r1 = s.ny - 1 - int(hi_y), s.ny - int(lo_y)  # rows [r0, r1), north-up
        width = c1 - c0
        idx = fy.astype(np.int64)  # index within the block: (r - r0) * width + (col - c0)
        idx *= -width
        idx += (s.ny - 1 - r0) * width - c0
        idx += fx.astype(np.int64)
        del fx, fy
        if self._ref is None:
            self._ref = float(np.mean(z))
        block = (r1 - r0, width)
        d = np.subtract(z, self._ref)
        cells = block[0] * block[1]
        self._count[r0:r1, c0:c1] += np.bincount(idx, minlength=cells).reshape(block)
        self._sum[r0:r1, c0:c1] += np.bincount(idx, weights=d, minlength=cells).reshape(block)
        d *= d
        self._sumsq[r0:r1, c0:c1] += np.bincount(idx, weights=d, minlength=cells).reshape(block)

    def finish(self) -> EpochGrid:
        """The epoch grids. The running sums turn into them in place: a grid-sized temporary is a
        fresh allocation, and first-touch page faults of fresh memory cost as much as the
        arithmetic. So this ends the accumulator; ``add`` or ``finish`` after it raise."""
        if self._count is None:
            raise RuntimeError("GridAccumulator.finish() was called already")
        n, mean, var = self._count, self._sum, self._sumsq
        self._count = self._sum = self._sumsq = None  # type: ignore[assignment]
        if n.size and n.max() > np.iinfo(np.uint32).max:
            raise OverflowError("more than 4e9 points in one cell: use a larger cell size")
        count = n.astype(np.uint32)
        empty = n == 0
        with np.errstate(invalid="ignore", divide="ignore"):
            np.divide(mean, n, out=mean)  # mean of z - ref
            np.divide(var, n, out=var)  # mean of (z - ref)²
            square = n.view(np.float64)  # the counts' memory, no longer needed, holds mean²
            np.multiply(mean, mean, out=square)
            var -= square
            np.maximum(var, 0.0, out=var)
        mean[empty] = np.nan
        var[empty] = np.nan
        mean += self._ref if self._ref is not None else 0.0
        np.sqrt(var, out=var)
        return EpochGrid(
            elevation=mean.astype(np.float32),
            elevation_std=var.astype(np.float32),
            point_count=count,
            outside=self.outside,
        )


def bin_points(spec: GridSpec, x: np.ndarray, y: np.ndarray, z: np.ndarray) -> EpochGrid:
    """One-shot convenience over :class:`GridAccumulator` for points already in memory."""
    acc = GridAccumulator(spec)
    acc.add(np.asarray(x, np.float64), np.asarray(y, np.float64), np.asarray(z, np.float64))
    return acc.finish()
