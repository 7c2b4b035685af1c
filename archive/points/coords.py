"""Coordinates stored exactly: the scaled integers of LAS, visible as real numbers.

A LAS file stores integers X and a scale and offset; the real coordinate is X*scale + offset
(ASPRS LAS 1.4, "Point Data Records"), and the specification allows any double as scale and
offset. Two representations, chosen per axis from the header:

* **decimal** (scale and offset are short decimals such as 0.001, 0.0025, 500000.25): we store
  N = X*(scale*10^k) + offset*10^k as a Parquet DECIMAL(18, k) on INT64, so DuckDB and pyarrow
  see real coordinates, the value is exactly the decimal the scanner recorded, and delta
  encoding keeps the integers small.
* **float** (any other scale, e.g. 1.16451354e-06 or 1.0000000000000002e-06, or a decimal that
  needs more than 18 digits): we store float64 x = float64(X)*scale + offset, computed exactly as
  a LAS reader computes it, so the column *is* the reader's value. The integers stay
  recoverable as round((x - offset)/scale): that holds for every int32 X when
  |offset|/scale + 2^31 < 2^50 (two roundings of at most half an ulp each stay far below half a
  step), and ``from_las`` checks it on every point it encodes. Where the bound does not hold the
  axis is marked ``raw`` and the file also stores the LAS integers as int32 column ``<axis>_raw``.

The LAS scale and offset of each axis go into the file's key-value metadata ("axes"), so
`to_float` rebuilds the float64 value bit for bit as a LAS reader computes it and `to_las`
gives back the file's integers.
"""

from __future__ import annotations

from dataclasses import dataclass
from decimal import Decimal

import numpy as np
import pyarrow as pa

MAX_DIGITS = 18  # DECIMAL precision that fits INT64
DECIMAL_LIMIT = 10**MAX_DIGITS
RECOVERABLE = 2.0**50  # |offset|/scale + 2^31 below this: round((x - offset)/scale) gives X back


class LossyEncoding(ValueError):
    """The stored value would not give back the source's integer: refuse to write it."""


def _decimal_places(value: float) -> int:
    exponent = Decimal(repr(float(value))).normalize().as_tuple().exponent
    return max(0, -int(exponent))


@dataclass(frozen=True)
class AxisEncoding:
    """How one axis maps between stored integers and real coordinates."""

    scale: float  # LAS scale (or 10^-k for text sources)
    offset: float  # LAS offset (0 for text sources)
    places: int  # k, digits after the decimal point in the stored DECIMAL (0 for float axes)
    text: bool = False  # parsed from text: floats are the nearest doubles to the decimals
    kind: str = "decimal"  # "decimal" (DECIMAL(18, k)) or "float" (float64 X*scale + offset)
    raw: bool = False  # float axis whose integers are also stored (column <axis>_raw)

    @classmethod
    def for_las(cls, scale: float, offset: float) -> "AxisEncoding":
        """Decimal where scale and offset are decimals that fit 18 digits, else float (see module doc)."""
        scale, offset = float(scale), float(offset)
        places = max(_decimal_places(scale), _decimal_places(offset))
        if places <= MAX_DIGITS:
            enc = cls(scale, offset, places)
            if abs(enc._step) * 2**31 + abs(enc._shift) < DECIMAL_LIMIT:
                return enc
        raw = not abs(offset) / scale + 2**31 < RECOVERABLE
        return cls(scale, offset, 0, kind="float", raw=raw)

    @classmethod
    def for_text(cls, places: int) -> "AxisEncoding":
        return cls(10.0**-places, 0.0, places, text=True)

    @property
    def type(self) -> pa.DataType:
        """The column's type as readers of the file get it (in memory decimals travel as decimal64)."""
        return pa.float64() if self.kind == "float" else pa.decimal128(MAX_DIGITS, self.places)

    @property
    def _step(self) -> int:
        """scale * 10^k as an exact integer."""
        return int(Decimal(repr(self.scale)) * 10**self.places)

    @property
    def _shift(self) -> int:
        """offset * 10^k as an exact integer."""
        return int(Decimal(repr(self.offset)) * 10**self.places)

    @property
    def las_units(self) -> tuple[int, int]:
        """(step, shift) of a decimal axis: the stored units are X * step + shift."""
        return self._step, self._shift

    def from_las(self, raw: np.ndarray) -> pa.Array:
        """LAS integers X → the stored column of X*scale + offset (exact DECIMAL, or float64).

        For float axes without stored integers, every value is checked to give its integer back
        (``to_las``); a failure raises ``LossyEncoding`` rather than write a value that loses it.
        """
        if self.kind == "float":
            values = raw.astype(np.float64) * self.scale + self.offset  # ASPRS LAS 1.4, as laspy computes it
            if not self.raw:
                back = self.to_las(values)
                if not np.array_equal(back, raw):
                    bad = int(np.flatnonzero(back != raw)[0])
                    raise LossyEncoding(
                        f"integer {int(raw[bad])} with scale {self.scale!r} and offset {self.offset!r} does not "
                        "survive as a float64 coordinate"
                    )
            return pa.array(values, pa.float64())
        return decimal_from_units(self.units(raw), self.places)

    def units(self, raw: np.ndarray) -> np.ndarray:
        """LAS integers X of a decimal axis → the stored int64 counts of 10^-k."""
        units = raw.astype(np.int64)
        step, shift = self._step, self._shift
        if step != 1:  # 1 for the usual case, scale and 10^-k equal
            units *= step
        if shift:
            units += shift
        return units

    def to_las(self, values: np.ndarray) -> np.ndarray:
        """float64 coordinates of a float axis → the LAS integers they were computed from."""
        return np.rint((np.asarray(values, dtype=np.float64) - self.offset) / self.scale).astype(np.int64)

    def from_float(self, values: np.ndarray) -> tuple[pa.Array, np.ndarray]:
        """Floats parsed from text → DECIMAL; also returns a mask of values not exact at k places."""
        units = np.rint(np.asarray(values, dtype=np.float64) * 10.0**self.places)
        inexact = ~np.isfinite(units) | (units / 10.0**self.places != values)
        units = np.where(np.isfinite(units), units, 0).astype(np.int64)
        return decimal_from_units(units, self.places), inexact

    def to_float(self, units: np.ndarray) -> np.ndarray:
        """Stored integers (or float64 values of a float axis) → float64 exactly as the source's reader computes them."""
        if self.kind == "float":
            return np.asarray(units, dtype=np.float64)
        if self.text:
            # the correctly rounded quotient of two exact doubles equals float(text)
            return units.astype(np.float64) / 10.0**self.places
        step = self._step
        raw = units - self._shift
        if step != 1:  # 1 for the usual case, scale and 10^-k equal
            raw //= step
        values = raw.astype(np.float64)
        values *= self.scale
        values += self.offset
        return values

    def to_dict(self) -> dict:
        return {"scale": self.scale, "offset": self.offset, "places": self.places, "text": self.text,
                "kind": self.kind, "raw": self.raw}

    @classmethod
    def from_dict(cls, d: dict) -> "AxisEncoding":
        return cls(float(d["scale"]), float(d["offset"]), int(d["places"]), bool(d.get("text", False)),
                   str(d.get("kind", "decimal")), bool(d.get("raw", False)))

    def column(self, table: pa.Table, axis: str) -> np.ndarray:
        """float64 coordinates of ``axis`` in ``table`` as the source's reader computes them."""
        column = table.column(axis)
        if pa.types.is_decimal(column.type):
            return self.to_float(units_of(column, copy=False))
        return column.to_numpy().astype(np.float64, copy=False)


def decimal_from_units(units: np.ndarray, places: int) -> pa.Array:
    """int64 counts of 10^-places → DECIMAL(18, places) as Arrow's decimal64, sharing the buffer.

    Parquet stores DECIMAL(18, k) as INT64 either way; decimal64 skips building 16-byte values
    that the writer would narrow again. The file's Arrow schema says decimal128, so readers get
    decimal128 (see write.py).
    """
    units = np.ascontiguousarray(units, dtype=np.int64)
    return pa.Array.from_buffers(pa.decimal64(MAX_DIGITS, places), units.size, [None, pa.py_buffer(units)])


def units_of(array: pa.Array | pa.ChunkedArray, copy: bool = True) -> np.ndarray:
    """DECIMAL array (decimal64 or decimal128) → int64 counts of 10^-scale (for decimal128 the low
    word; values fit INT64 by construction). ``copy=False`` may return a view of the buffer."""
    if isinstance(array, pa.ChunkedArray):
        parts = [units_of(c, copy) for c in array.chunks]
        return np.concatenate(parts) if parts else np.empty(0, np.int64)
    if array.null_count:
        raise ValueError("coordinate columns may not hold nulls")
    words = np.frombuffer(array.buffers()[1], dtype=np.int64)
    step = array.type.bit_width // 64
    view = words[step * array.offset : step * (array.offset + len(array)) : step]
    return view.copy() if copy else view
