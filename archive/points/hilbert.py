"""Hilbert keys of points on a site-wide grid.

Sorting points by a Hilbert key of their (x, y) cell keeps neighbours in space near each other in
the file, so a row group covers a small, compact area and its min/max statistics prune well. The
grid is one square per site (not per scan), so keys of different scans of a site agree.

The key is computed with a state machine over blocks of bits: for each of the curve's four
orientations and each pair of ``STEP``-bit blocks of x and y, a table gives the ``2*STEP`` key
digits and the orientation of the next level. Order 16 then takes two table look-ups per point,
which numpy runs as plain gathers.

Convention: ``hilbert_index(ix, iy, p)`` equals ``HilbertCurve(p, 2).distance_from_point([ix, iy])``
of the PyPI package ``hilbertcurve`` (checked in tests for every cell of orders 1..6).
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import lru_cache

import numpy as np

STEP = 8  # bits of each axis consumed per table look-up (table: 4 * 2^(2*STEP) entries)
BLOCK = 1 << 16  # points per pass, so the temporaries stay in cache

# The four orientations are the symmetries of the unit square that map the curve's start/end onto
# a side: identity, transpose, anti-transpose, half turn. Each is stored as the image of the
# quadrants (0,0), (0,1), (1,1), (1,0) in the base curve's order.
_BASE = ((0, 0), (0, 1), (1, 1), (1, 0))  # base order of quadrants (x bit, y bit)


def _apply(t: int, q: tuple[int, int]) -> tuple[int, int]:
    x, y = q
    return ((x, y), (y, x), (1 - y, 1 - x), (1 - x, 1 - y))[t]


def _compose(outer: int, inner: int) -> int:
    """The orientation that applies ``inner`` then ``outer``."""
    images = tuple(_apply(outer, _apply(inner, q)) for q in _BASE)
    return next(t for t in range(4) if tuple(_apply(t, q) for q in _BASE) == images)


_CHILD = (1, 0, 0, 2)  # orientation of each sub-square relative to its parent, in base order


def _unit_step(state: int, xb: int, yb: int) -> tuple[int, int]:
    """One level of the curve: (digit 0..3, next state) for the quadrant (xb, yb)."""
    for digit, q in enumerate(_BASE):
        if _apply(state, q) == (xb, yb):
            return digit, _compose(state, _CHILD[digit])
    raise AssertionError("unreachable")


@lru_cache(maxsize=None)
def _table(step: int) -> np.ndarray:
    """uint32 table indexed by state << 2*step | x block << step | y block → digits | next state << 2*step."""
    unit = np.array([[_unit_step(s, xb, yb) for xb in (0, 1) for yb in (0, 1)] for s in range(4)])
    side = 1 << step
    state, xa, ya = (a.ravel() for a in np.meshgrid(np.arange(4), np.arange(side), np.arange(side), indexing="ij"))
    digits = np.zeros(state.size, dtype=np.uint32)
    for bit in range(step - 1, -1, -1):
        pair = unit[state, ((xa >> bit) & 1) * 2 + ((ya >> bit) & 1)]
        digits = (digits << 2) | pair[:, 0].astype(np.uint32)
        state = pair[:, 1]
    table = digits | (state.astype(np.uint32) << (2 * step))
    table.setflags(write=False)
    return table


def _start_state(pad: int) -> int:
    """State after ``pad`` leading zero bits: padding must not change the curve of the real order."""
    s = 0
    for _ in range(pad):
        _, s = _unit_step(s, 0, 0)
    return s


def hilbert_index(ix: np.ndarray, iy: np.ndarray, order: int) -> np.ndarray:
    """Hilbert distance of integer cells (0 <= ix, iy < 2**order) as uint64."""
    ix, iy = np.asarray(ix), np.asarray(iy)
    if ix.shape != iy.shape:
        raise ValueError(f"ix and iy differ in shape: {ix.shape} vs {iy.shape}")
    return _blockwise(ix.reshape(-1), iy.reshape(-1), order, lambda a, axis: a).reshape(ix.shape)


def _blockwise(x: np.ndarray, y: np.ndarray, order: int, to_cell) -> np.ndarray:
    """Keys of `to_cell(x), to_cell(y)` computed block by block so temporaries stay in cache."""
    if not 1 <= order <= 32:
        raise ValueError(f"Hilbert order must be in 1..32, got {order}")
    out = np.empty(x.size, dtype=np.uint64)
    for start in range(0, x.size, BLOCK):
        sl = slice(start, start + BLOCK)
        out[sl] = _block_index(to_cell(x[sl], 0), to_cell(y[sl], 1), order)
    return out


def _block_index(ix: np.ndarray, iy: np.ndarray, order: int) -> np.ndarray:
    step = STEP
    steps = -(-order // step)
    pad = steps * step - order
    table = _table(step)
    # 32-bit arithmetic while the key fits: half the memory traffic of uint64
    t = np.uint32 if 2 * order <= 32 else np.uint64
    ix, iy = ix.astype(t, copy=False), iy.astype(t, copy=False)
    mask, width, digit_mask = t((1 << step) - 1), t(step), t((1 << 2 * step) - 1)
    shift_state = t(2 * step)
    key = np.zeros(ix.size, dtype=t)
    state = None
    for level in range(steps - 1, -1, -1):
        bits = t(level * step)
        index = (((ix >> bits) & mask) << width) | ((iy >> bits) & mask)
        index |= (t(_START[pad]) << shift_state) if state is None else (state << shift_state)
        entry = table[index].astype(t, copy=False)
        key = (key << shift_state) | (entry & digit_mask) if level < steps - 1 else entry & digit_mask
        state = entry >> shift_state
    return key


_START = [_start_state(pad) for pad in range(STEP)]


@dataclass(frozen=True)
class SiteGrid:
    """A square grid over a whole site: 2**order cells per axis from (x0, y0), side ``size``.

    Units are the shelf CRS's (real coordinates, not scaled integers).
    """

    x0: float
    y0: float
    size: float
    order: int = 16

    def __post_init__(self) -> None:
        if not self.size > 0:
            raise ValueError(f"SiteGrid.size must be positive, got {self.size}")
        if not 1 <= self.order <= 31:
            raise ValueError(f"SiteGrid.order must be in 1..31, got {self.order}")

    @classmethod
    def from_bounds(cls, xmin: float, ymin: float, xmax: float, ymax: float, order: int = 16) -> "SiteGrid":
        """The smallest square grid holding the bounds (the upper edge stays inside)."""
        if not (xmax >= xmin and ymax >= ymin):
            raise ValueError(f"bounds are inverted: ({xmin}, {ymin}, {xmax}, {ymax})")
        side = max(xmax - xmin, ymax - ymin)
        side = side * (1 + 2.0**-20) if side > 0 else 1.0
        return cls(float(xmin), float(ymin), float(side), order)

    @property
    def cells(self) -> int:
        return 1 << self.order

    def cell_of(self, x: np.ndarray, y: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Cell indices of real coordinates, clamped onto the grid."""
        scale = self.cells / self.size
        return _cell(x, self.x0, scale, self.cells), _cell(y, self.y0, scale, self.cells)

    def keys(self, x: np.ndarray, y: np.ndarray) -> np.ndarray:
        """Hilbert keys (uint64) of real coordinates; points off the grid get the key of the nearest cell."""
        scale = self.cells / self.size
        origin = (self.x0, self.y0)
        return _blockwise(
            np.asarray(x).reshape(-1), np.asarray(y).reshape(-1), self.order,
            lambda v, axis: _cell(v, origin[axis], scale, self.cells),
        )

    def keys_of_units(
        self, ux: np.ndarray, uy: np.ndarray, places: int,
        steps: tuple[int, int] = (1, 1), shifts: tuple[int, int] = (0, 0),
    ) -> np.ndarray:
        """Hilbert keys of scaled integers (real = units * 10**-places), as stored in DECIMAL columns.

        The units may come as integers i with units = i * step + shift per axis (a LAS file's X
        and its axis encoding, see coords.py): they are then made block by block, in cache, and
        never held whole.
        """
        unit = 10.0**places
        scale = self.cells / (self.size * unit)
        origin = (self.x0 * unit, self.y0 * unit)
        return _blockwise(
            np.asarray(ux).reshape(-1), np.asarray(uy).reshape(-1), self.order,
            lambda v, axis: _cell(_units(v, steps[axis], shifts[axis]), origin[axis], scale, self.cells),
        )

    def to_dict(self) -> dict:
        return {"x0": self.x0, "y0": self.y0, "size": self.size, "order": self.order}

    @classmethod
    def from_dict(cls, d: dict) -> "SiteGrid":
        return cls(float(d["x0"]), float(d["y0"]), float(d["size"]), int(d.get("order", 16)))


def _units(v: np.ndarray, step: int, shift: int) -> np.ndarray:
    """v * step + shift as float64, as the int64 result converted: float64 arithmetic is exact on
    integers below 2^53, so it is used where every result and product stays below that."""
    if step == 1 and shift == 0:
        return v
    if abs(step) * (1 << 32) + abs(shift) < 1 << 53:  # |v| < 2^32: int32 or uint32 source integers
        u = v.astype(np.float64)
        if step != 1:
            u *= step
        if shift:
            u += shift
        return u
    return v.astype(np.int64) * step + shift


def _cell(v: np.ndarray, origin: float, scale: float, cells: int) -> np.ndarray:
    c = (np.asarray(v, dtype=np.float64) - origin) * scale
    np.clip(c, 0, cells - 1, out=c)  # NaN stays NaN; callers validate finiteness first
    return c.astype(np.uint32)
