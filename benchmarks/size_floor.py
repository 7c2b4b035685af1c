"""How small can Parquet's own encodings make a shelf's points? A per-column floor beside LAZ.

Migrates one demo scan (uncompressed LAS 1.4 point format 6 with an extra-bytes dimension, as
benchmarks/migrate.py generates it), writes the same points as LAZ (laspy + lazrs), then
rewrites every column of the shelf's Parquet file alone, with the shelf's row-group size, in
each encoding the Parquet format defines for its type (PLAIN, DELTA_BINARY_PACKED,
BYTE_STREAM_SPLIT; dictionary for 8-bit columns) and zstd levels 1, 3 and 9. It prints, per
column, the bytes per point as written and the smallest of the variants, and the sum of those
smallest plus the shelf file's footer: what the best standard encoding per column could reach,
against LAZ's bytes per point.

BYTE_STREAM_SPLIT on integer columns is in the Parquet format since 2.11 (2024); older readers
cannot open such files, which is why the shelf keeps DELTA_BINARY_PACKED there.

    python benchmarks/size_floor.py [--points 5000000] [--workdir DIR]
"""

from __future__ import annotations

import argparse
import io
import shutil
import sys
import tempfile
from pathlib import Path

import pyarrow as pa
import pyarrow.parquet as pq

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from benchmarks.migrate import GENERATE, LAZ, MIGRATE, _child  # noqa: E402

LEVELS = (1, 3, 9)


def encodings(t: pa.DataType) -> list[str]:
    """The encodings the Parquet format allows for a column of Arrow type ``t``, as stored here."""
    if pa.types.is_floating(t):
        return ["PLAIN", "BYTE_STREAM_SPLIT"]
    if pa.types.is_boolean(t):
        return ["PLAIN"]
    return ["PLAIN", "DELTA_BINARY_PACKED", "BYTE_STREAM_SPLIT", "DICTIONARY"]  # integers and decimals


def chunk_bytes(meta: pq.FileMetaData) -> dict[str, int]:
    """Compressed bytes of every column's chunks (pages and their headers; not the footer)."""
    out: dict[str, int] = {}
    for g in range(meta.num_row_groups):
        for c in range(meta.num_columns):
            col = meta.row_group(g).column(c)
            out[col.path_in_schema] = out.get(col.path_in_schema, 0) + col.total_compressed_size
    return out


def column_bytes(table: pa.Table, name: str, encoding: str, level: int, row_group: int) -> int:
    sink = io.BytesIO()
    options = {"use_dictionary": True} if encoding == "DICTIONARY" else {
        "use_dictionary": False, "column_encoding": {name: encoding}}
    pq.write_table(table.select([name]), sink, row_group_size=row_group, compression="zstd",
                   compression_level=level, store_decimal_as_integer=True, write_statistics=False, **options)
    sink.seek(0)
    return chunk_bytes(pq.ParquetFile(sink).metadata)[name]


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--points", type=int, default=5_000_000)
    parser.add_argument("--workdir", default=None, help="default: a fresh folder under the system temp folder")
    args = parser.parse_args()
    work = Path(args.workdir) if args.workdir else Path(tempfile.mkdtemp(prefix="scanshelf-bench-size-"))
    shutil.rmtree(work, ignore_errors=True)
    (work / "source" / "north").mkdir(parents=True)
    las = work / "source" / "north" / "north_20260901_060000.las"
    n = _child(GENERATE.format(paths=[str(las)], n=args.points))["points"]
    _child("SPENT = {}\n" + MIGRATE.format(source=str(work / "source"), shelf=str(work / "shelf")))
    _child(LAZ.format(src=str(las), dst=str(work / "same.laz")))
    laz = (work / "same.laz").stat().st_size
    (shelf_file,) = (work / "shelf" / "points").rglob("*.parquet")
    meta = pq.ParquetFile(shelf_file).metadata
    row_group = meta.row_group(0).num_rows
    written = chunk_bytes(meta)
    table = pq.read_table(shelf_file)

    print(f"{n:,} points, row groups of {row_group:,}; bytes per point of column chunks, each column written alone")
    print(f"{'column':22s} {'as written':>10s} {'smallest':>9s}   smallest by")
    floor = 0.0
    for field in table.schema:
        best = min((column_bytes(table, field.name, e, lvl, row_group), e, lvl)
                   for e in encodings(field.type) for lvl in LEVELS)
        floor += best[0] / n
        print(f"{field.name:22s} {written[field.name] / n:10.3f} {best[0] / n:9.3f}   {best[1]}, zstd {best[2]}")
    shelf = shelf_file.stat().st_size
    floor += (shelf - sum(written.values())) / n  # the shelf file's footer and magic bytes
    print(f"\n{'shelf file':32s} {shelf / n:6.2f} bytes/point   {shelf / laz:.3f} x LAZ")
    print(f"{'best standard encoding per column':32s} {floor:6.2f} bytes/point   {floor * n / laz:.3f} x LAZ")
    print(f"{'LAZ (laspy + lazrs)':32s} {laz / n:6.2f} bytes/point")
    shutil.rmtree(work, ignore_errors=True)


if __name__ == "__main__":
    main()
