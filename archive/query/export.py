"""Write a remote subset to a local (or fsspec) file: Parquet, LAS/LAZ or CSV.

LAS output maps the exact decimals back to integers with the scans' own LAS scale and offset
(from the ``axes`` metadata), so a LAS-sourced point comes back with the very X, Y, Z
integers the scanner wrote (ASPRS LAS 1.4: coordinate = X * scale + offset).
"""

from __future__ import annotations

import json
import os
import posixpath
import tempfile
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from decimal import Decimal
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.csv as pcsv
import pyarrow.parquet as pq
from fsspec.implementations.local import LocalFileSystem

from archive.points.coords import AxisEncoding, units_of
from archive.query.iostats import IOStats
from archive.query.points import AXES, join_scans, read_scan
from archive.query.shelf import Scan, TimeLike, open_shelf
from archive.storage import filesystem

FORMATS = {".parquet": "parquet", ".pq": "parquet", ".las": "las", ".laz": "laz", ".csv": "csv"}
POINT_FORMAT_BY_COLOUR = {False: 6, True: 7}  # LAS 1.4 formats with GPS time (and RGB)


@dataclass
class ExtractResult:
    out: str
    points: int
    scans: int
    io: IOStats


def format_of(out: str) -> str:
    ext = os.path.splitext(out)[1].lower()
    if ext not in FORMATS:
        raise ValueError(f"{out}: unknown output type {ext!r}; use one of {sorted(FORMATS)}")
    return FORMATS[ext]


def extract(
    url: str,
    out: str,
    bbox: Sequence[float] | None = None,
    *,
    bbox_fraction: float | None = None,
    start: TimeLike = None,
    end: TimeLike = None,
    station: str | Sequence[str] | None = None,
    columns: list[str] | None = None,
    crs: Any = None,
    storage_options: dict | None = None,
    out_options: dict | None = None,
    progress: Callable[[Scan], Any] | None = None,
) -> ExtractResult:
    """Find scans at ``url`` over ``bbox`` and write their points inside it to ``out``.

    Instead of ``bbox``, ``bbox_fraction`` takes a centred box covering that fraction of the
    matched scans' joint extent: handy for a first look at an unknown shelf.
    """
    kind = format_of(out)
    if (bbox is None) == (bbox_fraction is None):
        raise ValueError("give exactly one of bbox and bbox_fraction")
    shelf = open_shelf(url, storage_options)
    if bbox is None:
        bbox = shelf.find(start=start, end=end, station=station).central_bbox(bbox_fraction)
        crs = None
    scans = shelf.find(bbox=bbox, start=start, end=end, station=station, crs=crs)
    cols = None if columns is None else list(dict.fromkeys(list(AXES) + list(columns)))
    tables, axes = [], []
    for scan in scans:
        table = read_scan(shelf.fs, scan.file, scans.bbox, cols, exact=True)
        if table.num_rows:
            tables.append(table)
            axes.append(axes_of_table(table))
        if progress is not None:
            progress(scan)
    if not tables:
        raise ValueError(f"{shelf.url}: no points inside {tuple(bbox)}; nothing written to {out}")
    joined = join_scans(tables)
    meta = {"source": shelf.url, "bbox": list(scans.bbox), "scans": [s.id for s in scans]}
    if shelf.crs is not None:
        meta["crs"] = shelf.crs.to_json_dict()
    _write_atomic(out, out_options, lambda path: _WRITERS[kind](joined, path, axes, shelf.crs, meta))
    return ExtractResult(out, joined.num_rows, len(tables), shelf.io.snapshot())


def axes_of_table(table: pa.Table) -> dict[str, AxisEncoding]:
    raw = (table.schema.metadata or {}).get(b"scanshelf")
    if not raw:
        return {}
    return {k: AxisEncoding.from_dict(v) for k, v in (json.loads(raw).get("axes") or {}).items()}


def _write_atomic(out: str, options: dict | None, write: Callable[[str], None]) -> None:
    """Write to a temporary name next to the target (or locally, then upload) and rename."""
    fs, path = filesystem(out, options)
    if isinstance(fs, LocalFileSystem):
        folder = os.path.dirname(os.path.abspath(path))
        os.makedirs(folder, exist_ok=True)
        fd, tmp = tempfile.mkstemp(prefix=".extract-", suffix=os.path.splitext(path)[1], dir=folder)
        os.close(fd)
        try:
            write(tmp)
            os.chmod(tmp, 0o666 & ~_umask())  # mkstemp's 0600 is for secrets; an extract is an ordinary file
            os.replace(tmp, path)
        finally:
            if os.path.exists(tmp):
                os.remove(tmp)
        return
    with tempfile.TemporaryDirectory() as d:
        tmp = os.path.join(d, posixpath.basename(path))
        write(tmp)
        fs.put_file(tmp, path)


def _umask() -> int:
    """The process umask (read by setting and restoring it; Python has no getter)."""
    mask = os.umask(0o022)
    os.umask(mask)
    return mask


def _write_parquet(table: pa.Table, path: str, axes, crs, meta: dict) -> None:
    if len({json.dumps({k: v.to_dict() for k, v in a.items()}, sort_keys=True) for a in axes}) == 1:
        meta = {**meta, "axes": {k: v.to_dict() for k, v in axes[0].items()}}
    table = table.replace_schema_metadata({"scanshelf": json.dumps(meta)})
    pq.write_table(table, path, compression="zstd", store_decimal_as_integer=True)


def _write_csv(table: pa.Table, path: str, axes, crs, meta: dict) -> None:
    pcsv.write_csv(table, path)  # decimals print as the exact stored digits


def _las_axis(name: str, encs: list[AxisEncoding], units: list[np.ndarray], places: int,
              ) -> tuple[AxisEncoding, np.ndarray]:
    """One LAS scale/offset for all scans and the int32 X of every point, exact or an error.

    ASPRS LAS 1.4: X = (x - offset) / scale must be a signed 32-bit integer. Scans that share
    one encoding whose integers fit keep it (their integers round-trip). Otherwise the scale
    and offset come from the points themselves: the finest scale that every point is an exact
    multiple of and whose 2^32 steps span the points, and a round offset near their centre.
    ``units`` are the stored decimals of each scan, counted in 10^-``places``.
    """
    scaled = np.concatenate(units).astype(np.int64)
    first = encs[0]
    if all(e == first for e in encs) and scaled.size and first.places <= places:
        diff = scaled - first._shift * 10 ** (places - first.places)
        step = first._step * 10 ** (places - first.places)
        if not np.any(diff % step):
            raw = diff // step
            if raw.min() >= -(2**31) and raw.max() < 2**31:
                return first, raw.astype(np.int32)
    if not scaled.size:
        return first, np.zeros(0, np.int32)
    low, high = int(scaled.min()), int(scaled.max())
    common = int(np.gcd.reduce(scaled - low)) or 1  # every point is low + a multiple of this
    steps = {10**k for k in range(places + 1)} | {common}
    steps |= {e._step * 10 ** (places - e.places) for e in encs if e.places <= places}
    span_limit = 2**32 - 1
    fitting = sorted(s for s in steps if common % s == 0 and (high - low) // s <= span_limit)
    if not fitting:
        unit = Decimal(common).scaleb(-places)
        raise ValueError(
            f"{name}: the points span {Decimal(high - low).scaleb(-places)} at a precision of {unit}, more than "
            "LAS's 32-bit integers can hold exactly at one scale; extract a smaller box, or to .parquet or .csv "
            "(which keep every digit)"
        )
    step = fitting[0]
    centre = low + step * (((high - low) // step) // 2)
    shift = next((o for o in _round_offsets(centre, places) if (o - low) % step == 0
                  and (high - o) // step < 2**31 and (o - low) // step <= 2**31), centre)
    chosen = AxisEncoding(float(Decimal(step).scaleb(-places)), float(Decimal(shift).scaleb(-places)), places)
    if chosen._step != step or chosen._shift != shift:  # a float that does not hold the decimal exactly
        raise ValueError(f"{name}: no LAS scale and offset represent these coordinates exactly; extract to .parquet")
    return chosen, ((scaled - shift) // step).astype(np.int32)


def _round_offsets(centre: int, places: int) -> list[int]:
    """Offsets near ``centre`` (in units of 10^-places), roundest first: whole kilometres, then metres, ..."""
    return [round(centre / 10**k) * 10**k for k in range(places + 3, -1, -1)]


def _write_las(table: pa.Table, path: str, axes, crs, meta: dict, compress: bool = False) -> None:
    import laspy

    colour = all(c in table.column_names for c in ("red", "green", "blue"))
    fmt = laspy.PointFormat(POINT_FORMAT_BY_COLOUR[colour])
    standard = set(fmt.dimension_names) - {"X", "Y", "Z"}
    extra = [
        c for c in table.column_names
        if c not in standard and c not in AXES and c != "scan_id"
        and (pa.types.is_integer(table[c].type) or pa.types.is_floating(table[c].type))
    ]
    for c in extra:
        fmt.add_extra_dimension(laspy.ExtraBytesParams(name=c, type=table[c].type.to_pandas_dtype()))
    header = laspy.LasHeader(point_format=fmt, version="1.4")
    # split the joined table back into its scans to map each with its own encoding
    edges = np.cumsum(_scan_lengths(table))[:-1]
    integers = []
    for axis_i, name in enumerate(AXES):
        if pa.types.is_floating(table[name].type):  # a float axis (coords.py): its scans' own LAS integers
            encs = [a.get(name) for a in axes]
            if any(e is None or e != encs[0] for e in encs):
                raise ValueError(f"{name}: these scans use LAS scales that cannot share one file exactly; "
                                 "extract per station, or to Parquet")
            integers.append(encs[0].to_las(table[name].to_numpy()).astype(np.int32))
            header.scales[axis_i], header.offsets[axis_i] = encs[0].scale, encs[0].offset
            continue
        units = np.split(units_of(table[name]), edges)
        encs = [a.get(name) or AxisEncoding.for_text(table[name].type.scale) for a in axes]
        chosen, raw = _las_axis(name, encs, units, table[name].type.scale)
        integers.append(raw)
        header.scales[axis_i], header.offsets[axis_i] = chosen.scale, chosen.offset
    if crs is not None:
        header.add_crs(crs)
    las = laspy.LasData(header)
    las.X, las.Y, las.Z = integers
    for c in [c for c in table.column_names if c in standard] + extra:
        las[c] = _filled(table[c])
    las.update_header()
    las.write(path, do_compress=compress)


def _filled(column: pa.ChunkedArray) -> np.ndarray:
    """LAS has no nulls: a field some scans lack becomes NaN (floats) or 0 (integers)."""
    if column.null_count:
        column = pc.fill_null(column, float("nan") if pa.types.is_floating(column.type) else 0)
    return column.to_numpy()


def _scan_lengths(table: pa.Table) -> list[int]:
    ids = table["scan_id"].to_numpy(zero_copy_only=False)
    if ids.size == 0:
        return [0]
    change = np.flatnonzero(ids[1:] != ids[:-1]) + 1
    edges = np.concatenate([[0], change, [ids.size]])
    return list(np.diff(edges))


_WRITERS = {
    "parquet": _write_parquet,
    "csv": _write_csv,
    "las": _write_las,
    "laz": lambda t, p, a, c, m: _write_las(t, p, a, c, m, compress=True),
}
