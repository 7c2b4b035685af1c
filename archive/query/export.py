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
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.csv as pcsv
import pyarrow.parquet as pq
from fsspec.implementations.local import LocalFileSystem

from archive.points.coords import AxisEncoding, units_of
from archive.query.iostats import IOStats
from archive.query.points import AXES, read_scan
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
    joined = pa.concat_tables([t.replace_schema_metadata(None) for t in tables], promote_options="permissive")
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
            os.replace(tmp, path)
        finally:
            if os.path.exists(tmp):
                os.remove(tmp)
        return
    with tempfile.TemporaryDirectory() as d:
        tmp = os.path.join(d, posixpath.basename(path))
        write(tmp)
        fs.put_file(tmp, path)


def _write_parquet(table: pa.Table, path: str, axes, crs, meta: dict) -> None:
    if len({json.dumps({k: v.to_dict() for k, v in a.items()}, sort_keys=True) for a in axes}) == 1:
        meta = {**meta, "axes": {k: v.to_dict() for k, v in axes[0].items()}}
    table = table.replace_schema_metadata({"scanshelf": json.dumps(meta)})
    pq.write_table(table, path, compression="zstd", store_decimal_as_integer=True)


def _write_csv(table: pa.Table, path: str, axes, crs, meta: dict) -> None:
    pcsv.write_csv(table, path)  # decimals print as the exact stored digits


def _las_axis(name: str, encs: list[AxisEncoding], units: list[np.ndarray]) -> tuple[AxisEncoding, np.ndarray]:
    """One LAS scale/offset for all scans and the int32 X of every point, exact or an error.

    Scans that agree keep their own scale and offset (their integers round-trip). Text
    sources (offset 0) get a round offset near the data so X fits 32 bits.
    """
    first = encs[0]
    places = max(e.places for e in encs)
    chosen = first if all(e == first for e in encs) else AxisEncoding(min(e.scale for e in encs), first.offset, places)
    scaled = [u * 10 ** (chosen.places - e.places) for u, e in zip(units, encs)]
    if chosen.offset == 0.0:
        low = min(int(u.min()) for u in scaled if u.size)
        if abs(low // chosen._step) >= 2**31:
            chosen = AxisEncoding(chosen.scale, float(low // 10**chosen.places // 1000 * 1000), chosen.places)
    diff = np.concatenate(scaled) - chosen._shift
    if np.any(diff % chosen._step):
        raise ValueError(
            f"{name}: these scans use LAS scales that cannot share one file exactly; "
            "extract per station, or to Parquet"
        )
    raw = diff // chosen._step
    if raw.size and (raw.min() < -(2**31) or raw.max() >= 2**31):
        raise ValueError(f"{name}: coordinates do not fit LAS 32-bit integers at scale {chosen.scale}")
    return chosen, raw.astype(np.int32)


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
        chosen, raw = _las_axis(name, encs, units)
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
