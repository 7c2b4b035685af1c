"""Coordinates as exact decimals: the scaled integers of LAS, visible as real numbers.

A LAS file stores integers X and a scale and offset; the real coordinate is X*scale + offset
(ASPRS LAS 1.4, "Point Data Records"). We store N = X*(scale*10^k) + offset*10^k as a Parquet
DECIMAL(18, k) on INT64, so DuckDB and pyarrow see real coordinates, the value is exactly the
decimal the scanner recorded, and delta encoding keeps the integers small. The LAS scale and
offset are kept too, so `to_float` can rebuild the float64 value bit for bit as a LAS reader
computes it.
"""

from __future__ import annotations

from dataclasses import dataclass
from decimal import Decimal

import numpy as np
import pyarrow as pa

MAX_DIGITS = 18  # DECIMAL precision that fits INT64


def _decimal_places(value: float) -> int:
    exponent = Decimal(repr(float(value))).normalize().as_tuple().exponent
    return max(0, -int(exponent))


@dataclass(frozen=True)
class AxisEncoding:
    """How one axis maps between stored integers and real coordinates."""

    scale: float  # LAS scale (or 10^-k for text sources)
    offset: float  # LAS offset (0 for text sources)
    places: int  # k, digits after the decimal point in the stored DECIMAL
    text: bool = False  # parsed from text: floats are the nearest doubles to the decimals

    @classmethod
    def for_las(cls, scale: float, offset: float) -> "AxisEncoding":
        places = max(_decimal_places(scale), _decimal_places(offset))
        return cls(float(scale), float(offset), places)

    @classmethod
    def for_text(cls, places: int) -> "AxisEncoding":
        return cls(10.0**-places, 0.0, places, text=True)

    @property
    def type(self) -> pa.DataType:
        return pa.decimal128(MAX_DIGITS, self.places)

    @property
    def _step(self) -> int:
        """scale * 10^k as an exact integer."""
        return int(Decimal(repr(self.scale)) * 10**self.places)

    @property
    def _shift(self) -> int:
        """offset * 10^k as an exact integer."""
        return int(Decimal(repr(self.offset)) * 10**self.places)

    def from_las(self, raw: np.ndarray) -> pa.Array:
        """LAS integers X → exact DECIMAL array of X*scale + offset."""
        units = raw.astype(np.int64) * self._step + self._shift
        return decimal_from_units(units, self.places)

    def from_float(self, values: np.ndarray) -> tuple[pa.Array, np.ndarray]:
        """Floats parsed from text → DECIMAL; also returns a mask of values not exact at k places."""
        units = np.rint(np.asarray(values, dtype=np.float64) * 10.0**self.places)
        inexact = ~np.isfinite(units) | (units / 10.0**self.places != values)
        units = np.where(np.isfinite(units), units, 0).astype(np.int64)
        return decimal_from_units(units, self.places), inexact

    def to_float(self, units: np.ndarray) -> np.ndarray:
        """Stored integers → float64 exactly as the source's reader computes them."""
        if self.text:
            # the correctly rounded quotient of two exact doubles equals float(text)
            return units.astype(np.float64) / 10.0**self.places
        raw = (units - self._shift) // self._step
        return raw.astype(np.float64) * self.scale + self.offset

    def to_dict(self) -> dict:
        return {"scale": self.scale, "offset": self.offset, "places": self.places, "text": self.text}

    @classmethod
    def from_dict(cls, d: dict) -> "AxisEncoding":
        return cls(float(d["scale"]), float(d["offset"]), int(d["places"]), bool(d.get("text", False)))


def decimal_from_units(units: np.ndarray, places: int) -> pa.Array:
    """int64 count of 10^-places → decimal128(18, places) without a copy through Python."""
    units = np.ascontiguousarray(units, dtype=np.int64)
    pairs = np.empty((units.size, 2), dtype=np.int64)
    pairs[:, 0] = units
    pairs[:, 1] = units >> 63  # sign extension into the high word (little-endian two's complement)
    return pa.Array.from_buffers(pa.decimal128(MAX_DIGITS, places), units.size, [None, pa.py_buffer(pairs)])


def units_of(array: pa.Array | pa.ChunkedArray) -> np.ndarray:
    """DECIMAL array → int64 counts of 10^-scale (the low word; values fit INT64 by construction)."""
    if isinstance(array, pa.ChunkedArray):
        parts = [units_of(c) for c in array.chunks]
        return np.concatenate(parts) if parts else np.empty(0, np.int64)
    if array.null_count:
        raise ValueError("coordinate columns may not hold nulls")
    words = np.frombuffer(array.buffers()[1], dtype=np.int64)
    return words[2 * array.offset : 2 * (array.offset + len(array)) : 2].copy()
