"""Rows as records: one numpy structured array per chunk, and the codec that keys and decodes it.

The sort moves whole rows; held as one record per row, moving a row is one copy of its bytes
rather than one gather per column, and a spill file holds exactly the records. A LAS file's own
point records are such rows already (``archive.sources.las.LasCodec``); any Arrow table becomes
rows through :class:`TableCodec`, which packs one field per column.

Coordinates leave the codec as DECIMAL(18, k) in Arrow's ``decimal64`` (the int64 count of
10^-k is the array's buffer, so no conversion on the way to Parquet's INT64), or as float64.
"""

from __future__ import annotations

import itertools
import mmap
from collections.abc import Iterable, Iterator
from dataclasses import dataclass
from typing import Protocol

import numpy as np
import pyarrow as pa

from .coords import MAX_DIGITS, decimal_from_units, units_of
from .hilbert import SiteGrid

COORDS = ("x", "y", "z")


class RowCodec(Protocol):
    """How a chunk's records are keyed and turned back into an Arrow table."""

    dtype: np.dtype  # one structured record per row
    schema: pa.Schema  # of the tables `decode` returns

    def keys(self, records: np.ndarray, grid: SiteGrid) -> np.ndarray:
        """Hilbert keys of the records' x, y on `grid`."""

    def decode(self, records: np.ndarray) -> pa.Table:
        """The records as a table of `schema`, in the same order."""


@dataclass
class Rows:
    """A scan's points as record chunks (each a structured array of ``codec.dtype``)."""

    codec: RowCodec
    chunks: Iterable[np.ndarray]


def numeric_array(values: np.ndarray) -> pa.Array:
    """A numpy numeric array as an Arrow array over a contiguous copy of it (or itself when
    contiguous). Unlike ``pa.array`` this does not import pandas (0.25 s per process)."""
    values = np.ascontiguousarray(values)
    return pa.Array.from_buffers(pa.from_numpy_dtype(values.dtype), len(values), [None, pa.py_buffer(values)])


def held_records(n: int, dtype: np.dtype) -> np.ndarray:
    """An empty array of ``n`` records on plain 4 KiB pages, for records the sort holds until the end.

    numpy asks the kernel for huge pages on large arrays; where free memory is fragmented the
    kernel then compacts memory on the first touch of each one, which cost 1-2 CPU-s per 680 MB
    of records on our test machine against 0.5 s on plain pages (an anonymous mmap)."""
    nbytes = n * dtype.itemsize
    if nbytes < 1 << 20:
        return np.empty(n, dtype)
    return np.frombuffer(mmap.mmap(-1, nbytes), dtype=dtype, count=n)


def keys_of_axes(grid: SiteGrid, x: np.ndarray, y: np.ndarray, tx: pa.DataType, ty: pa.DataType) -> np.ndarray:
    """Keys of stored x, y values: decimal units (same scale) directly, anything else as real numbers."""
    if pa.types.is_decimal(tx) and pa.types.is_decimal(ty) and tx.scale == ty.scale:
        return grid.keys_of_units(x, y, tx.scale)
    real = [v if pa.types.is_floating(t) else v * 10.0**-t.scale for v, t in ((x, tx), (y, ty))]
    return grid.keys(*real)


@dataclass(frozen=True)
class _Field:
    name: str
    type: pa.DataType  # of the decoded column
    kind: str  # "units" (decimal x, y, z as int64), "bool" (as uint8), "fixed" (the value's bytes)
    dtype: np.dtype
    nullable: bool


class TableCodec:
    """Rows of Arrow tables of one schema: one packed field per column, plus a validity byte for
    each nullable column other than x, y, z (which may not hold nulls)."""

    def __init__(self, schema: pa.Schema):
        missing = [c for c in COORDS if c not in schema.names]
        if missing:
            raise ValueError(f"points need columns {', '.join(COORDS)}; missing {', '.join(missing)}")
        self.fields = [self._field(f) for f in schema]
        self.schema = pa.schema([pa.field(f.name, f.type) for f in self.fields])
        layout = [(f"c{i}", f.dtype) for i, f in enumerate(self.fields)]
        layout += [(f"v{i}", np.uint8) for i, f in enumerate(self.fields) if f.nullable]
        self.dtype = np.dtype(layout)
        self._input = schema

    @staticmethod
    def _field(field: pa.Field) -> _Field:
        t = field.type
        if field.name in COORDS:
            if pa.types.is_float64(t):  # coords.py "float" axes: any LAS scale that is not a short decimal
                return _Field(field.name, t, "fixed", np.dtype(np.float64), False)
            if not pa.types.is_decimal(t) or t.precision > MAX_DIGITS or t.bit_width < 64:
                raise TypeError(f"column {field.name!r} must be decimal(18, k) or float64 from coords.py, got {t}")
            return _Field(field.name, pa.decimal64(MAX_DIGITS, t.scale), "units", np.dtype(np.int64), False)
        if pa.types.is_boolean(t):
            return _Field(field.name, t, "bool", np.dtype(np.uint8), field.nullable)
        width = getattr(t, "bit_width", 0)
        if not pa.types.is_primitive(t) and not pa.types.is_decimal(t) or width % 8 or width == 0:
            raise TypeError(
                f"column {field.name!r} has type {t}, which is not fixed-width; cast it to a numeric type "
                "before writing points"
            )
        if pa.types.is_integer(t) or pa.types.is_floating(t):
            dtype = np.dtype(t.to_pandas_dtype())
        else:
            nbytes = width // 8
            dtype = np.dtype({1: np.uint8, 2: np.uint16, 4: np.uint32, 8: np.uint64}.get(nbytes, f"V{nbytes}"))
        return _Field(field.name, t, "fixed", dtype, field.nullable)

    def encode(self, table: pa.Table, at_row: int = 0) -> np.ndarray:
        if not table.schema.equals(self._input):
            raise ValueError(f"chunk at row {at_row} has schema {table.schema}, expected {self._input}")
        out = np.empty(table.num_rows, self.dtype)
        for i, f in enumerate(self.fields):
            column = table.column(f.name)
            array = column.combine_chunks() if column.num_chunks != 1 else column.chunk(0)
            if f.kind == "units":
                out[f"c{i}"] = units_of(array)
                continue
            if f.nullable:
                out[f"v{i}"] = array.is_valid().to_numpy(zero_copy_only=False) if array.null_count else 1
            if f.kind == "bool":
                out[f"c{i}"] = array.fill_null(False).to_numpy(zero_copy_only=False)
            elif f.name in COORDS and array.null_count:
                raise ValueError("coordinate columns may not hold nulls")
            else:
                values = np.frombuffer(array.buffers()[1], dtype=f.dtype, count=array.offset + len(array))
                out[f"c{i}"] = values[array.offset :]
        return out

    def keys(self, records: np.ndarray, grid: SiteGrid) -> np.ndarray:
        i, j = self.schema.names.index("x"), self.schema.names.index("y")
        return keys_of_axes(grid, records[f"c{i}"], records[f"c{j}"], self.schema.field(i).type, self.schema.field(j).type)

    def decode(self, records: np.ndarray) -> pa.Table:
        arrays = []
        for i, f in enumerate(self.fields):
            values = records[f"c{i}"]
            if f.kind == "units":
                arrays.append(decimal_from_units(values, f.type.scale))
                continue
            valid = records[f"v{i}"] if f.nullable else None
            mask, nulls = None, 0
            if valid is not None and not valid.all():
                mask, nulls = pa.py_buffer(np.packbits(valid.astype(bool), bitorder="little")), -1
            if f.kind == "bool":
                bits = pa.py_buffer(np.packbits(values.astype(bool), bitorder="little"))
                arrays.append(pa.Array.from_buffers(f.type, len(values), [mask, bits], null_count=nulls))
            else:
                data = pa.py_buffer(np.ascontiguousarray(values))
                arrays.append(pa.Array.from_buffers(f.type, len(values), [mask, data], null_count=nulls))
        return pa.Table.from_arrays(arrays, schema=self.schema)


def table_rows(chunks: Iterable[pa.Table]) -> Rows | None:
    """Rows of an iterable of tables (the first table's schema sets the layout); None when empty."""
    it = iter(chunks)
    first = next(it, None)
    if first is None:
        return None
    codec = TableCodec(first.schema)

    def encoded() -> Iterator[np.ndarray]:
        rows = 0
        for table in itertools.chain([first], it):
            yield codec.encode(table, rows)
            rows += table.num_rows

    return Rows(codec, encoded())
