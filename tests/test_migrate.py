"""Migration of a small hand-made source: nothing lost, faults reported, re-runs idempotent."""

from __future__ import annotations

import json
import sqlite3
from datetime import UTC, datetime
from pathlib import Path

import duckdb
import laspy
import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from click.testing import CliRunner

from archive.cli import cli
from archive.migrate import migrate
from archive.points.coords import AxisEncoding, units_of
from tests import factory


def _points(shelf: Path) -> dict[str, pa.Table]:
    return {p.stem: pq.read_table(p) for p in sorted((shelf / "points").rglob("*.parquet"))}


def _floats(path: Path, axis: str) -> np.ndarray:
    meta = json.loads(pq.read_schema(path).metadata[b"scanshelf"])
    enc = AxisEncoding.from_dict(meta["axes"][axis])
    return enc.to_float(units_of(pq.read_table(path, columns=[axis]).column(axis)))


def test_good_scans_converted_and_faults_reported(small_shelf):
    shelf, result, expected = small_shelf
    tables = _points(shelf)
    assert sorted(tables) == [
        "north-20260901T060000Z", "north-20260901T120000Z", "north-20260904T060000Z",
        "south-20260901T180000Z", "south-20260902T060000Z",
    ]
    assert sum(t.num_rows for t in tables.values()) == sum(expected.values()) + 1_000  # + the CRS-less file, given --crs
    failed = dict(result.failed)
    assert "header declares 10000 points but the file holds" in failed["north/2026/09/trunc.las"]
    assert "--salvage" in failed["north/2026/09/trunc.las"]
    assert "3 malformed or non-numeric rows" in failed["south/exports/bad 20260903T060000.csv"]
    assert result.duplicates == [("north/copy of scan_a.las", "north/2026/09/scan_a.las")]
    assert not result.ok


def test_points_equal_laspy_bit_for_bit(small_source, small_shelf):
    # reference: laspy reading the source file; ASPRS LAS 1.4 coordinate formula X*scale+offset
    root, _ = small_source
    shelf, _, _ = small_shelf
    las = laspy.read(str(root / "north/2026/09/scan_b.laz"))
    path = next((shelf / "points").rglob("north-20260901T120000Z.parquet"))
    table = pq.read_table(path)
    got = np.stack([_floats(path, a) for a in "xyz"] + [table.column("gps_time").to_numpy()], axis=1)
    want = np.stack([las.x, las.y, las.z, las.gps_time], axis=1)
    order_got = np.lexsort(got.T[::-1])
    order_want = np.lexsort(want.T[::-1])
    np.testing.assert_array_equal(got[order_got], want[order_want])  # exact, every point once
    for name in ("intensity", "red", "classification", "deviation", "point_source_id"):
        np.testing.assert_array_equal(
            np.sort(table.column(name).to_numpy()), np.sort(np.asarray(las[name])), err_msg=name
        )
    assert table.schema.field("deviation").type == pa.float32()
    assert table.schema.field("intensity").type == pa.uint16()


def test_duckdb_sees_the_same_points(small_source, small_shelf):
    # reference: DuckDB's own Parquet reader over the shelf's hive-partitioned folders
    root, _ = small_source
    shelf, _, _ = small_shelf
    las = laspy.read(str(root / "north/2026/09/scan_a.las"))
    glob = str(shelf / "points/**/*.parquet")
    rows = duckdb.sql(
        f"SELECT station, count(*), min(x), max(x), min(z), max(z) FROM read_parquet('{glob}', "
        "hive_partitioning=true, union_by_name=true) WHERE filename LIKE '%north-20260901T060000Z%' GROUP BY station"
    ).fetchall()
    station, count, xmin, xmax, zmin, zmax = rows[0]
    assert (station, count) == ("north", len(las.points))
    assert float(xmin) == pytest.approx(las.x.min(), abs=1e-9) and float(xmax) == pytest.approx(las.x.max(), abs=1e-9)
    assert float(zmin) == pytest.approx(las.z.min(), abs=1e-9) and float(zmax) == pytest.approx(las.z.max(), abs=1e-9)
    total = duckdb.sql(f"SELECT count(*) FROM read_parquet('{glob}', union_by_name=true)").fetchall()[0][0]
    assert total == sum(pq.ParquetFile(p).metadata.num_rows for p in (shelf / "points").rglob("*.parquet"))


def test_row_groups_are_spatially_tight(tmp_path):
    """Hilbert-sorted row groups each cover a small part of the scan: together about its area,
    where groups in arrival order would each span nearly all of it (ten times the area)."""
    from archive.migrate import migrate

    factory.write_las(tmp_path / "source/north/a.las", 20_000, factory.utc(2026, 9, 1, 6), seed=5)
    assert migrate(str(tmp_path / "source"), str(tmp_path / "shelf"), crs=factory.SITE_CRS, previews=False,
                   row_group_points=2_000).ok
    # reference: the scan's extent from its points as laspy reads them
    las = laspy.read(tmp_path / "source/north/a.las")
    scan_area = float((las.x.max() - las.x.min()) * (las.y.max() - las.y.min()))
    meta = pq.ParquetFile(next((tmp_path / "shelf/points").rglob("*.parquet"))).metadata
    assert meta.num_row_groups == 10
    names = meta.schema.to_arrow_schema().names
    areas = []
    for g in range(meta.num_row_groups):  # reference: the Parquet footer's min/max statistics, read by pyarrow
        sx, sy = (meta.row_group(g).column(names.index(c)).statistics for c in ("x", "y"))
        areas.append(float(sx.max - sx.min) * float(sy.max - sy.min))
    assert sum(areas) < 3 * scan_area, (sum(areas) / scan_area, areas)
    assert max(areas) < 0.5 * scan_area


def test_ledger_records_every_file(small_shelf):
    shelf, _, _ = small_shelf
    db = sqlite3.connect(shelf / "ledger.sqlite")
    status = dict(db.execute("SELECT relpath, status FROM files").fetchall())
    assert status["north/copy of scan_a.las"] == "duplicate"
    assert status["north/2026/09/trunc.las"] == "failed"
    assert status["notes.txt"] == "ignored"
    assert status["north/2026/09/scan_a.las"] == "done"
    errors = dict(db.execute("SELECT relpath, error FROM files WHERE status='failed'").fetchall())
    assert "salvage" in errors["north/2026/09/trunc.las"]


def test_rerun_changes_nothing(small_source, small_shelf):
    root, _ = small_source
    shelf, _, _ = small_shelf
    before = {p: p.stat().st_mtime_ns for p in (shelf / "points").rglob("*.parquet")}
    again = migrate(str(root), str(shelf), crs=factory.SITE_CRS)
    assert again.converted == []
    assert again.skipped_done == 5
    assert {p: p.stat().st_mtime_ns for p in (shelf / "points").rglob("*.parquet")} == before
    assert not list(shelf.rglob("*.part-*"))


def test_salvage_keeps_readable_points(small_source, tmp_path):
    root, _ = small_source
    result = migrate(str(root), str(tmp_path / "shelf"), crs=factory.SITE_CRS, salvage=True, previews=False)
    tables = _points(tmp_path / "shelf")
    assert tables["north-20260902T060000Z"].num_rows == 10_000 - 1_001  # whole records before the cut
    assert tables["south-20260903T060000Z"].num_rows == 2_000
    assert sorted(result.partial) == ["north-20260902T060000Z", "south-20260903T060000Z"]
    db = sqlite3.connect(tmp_path / "shelf/ledger.sqlite")
    assert db.execute("SELECT status FROM files WHERE relpath='north/2026/09/trunc.las'").fetchone()[0] == "partial"


def test_without_crs_files_fail_with_the_fix(small_source, tmp_path):
    root, _ = small_source
    result = migrate(str(root), str(tmp_path / "shelf"), previews=False, catalog=False)
    failed = dict(result.failed)
    assert "no CRS in the file; give --crs" in failed["north/nocrs_20260904_060000.las"]


def test_spilled_sort_gives_identical_points(small_source, small_shelf, tmp_path):
    root, _ = small_source
    shelf, _, _ = small_shelf
    migrate(str(root), str(tmp_path / "shelf"), crs=factory.SITE_CRS, memory_budget=256 * 1024,
            chunk_points=5_000, previews=False, catalog=False)
    small = _points(tmp_path / "shelf")
    for name, table in _points(shelf).items():
        assert small[name].num_rows == table.num_rows
        keys = [(c, "ascending") for c in table.column_names]
        assert small[name].sort_by(keys).equals(table.sort_by(keys))


def test_cli_exit_codes(small_source, tmp_path):
    root, _ = small_source
    runner = CliRunner()
    out = runner.invoke(cli, ["survey", str(root), "-o", str(tmp_path / "s.parquet"), "-q", "--crs", factory.SITE_CRS])
    assert out.exit_code == 1, out.output
    assert "[duplicate] north/copy of scan_a.las" in out.output
    survey = pq.read_table(tmp_path / "s.parquet").to_pydict()
    assert len(survey["relpath"]) == 9
    clean = tmp_path / "clean"
    factory.write_las(clean / "north/a.las", 1000, factory.utc(2026, 9, 1, 6))
    out = runner.invoke(cli, ["migrate", str(clean), str(tmp_path / "shelf"), "-q"])
    assert out.exit_code == 0, out.output
    assert "converted 1 scans (1,000 points)" in out.output


def test_options_object_and_keyword_settings_agree(tmp_path: Path) -> None:
    # One MigrateOptions reaches every stage; keywords are applied over it, unknown ones refused.
    from archive.migrate import MigrateOptions

    src = tmp_path / "src"
    factory.write_las(src / "north" / "scan_20260901_060000.las", n=10_000, when=datetime(2026, 9, 1, 6, tzinfo=UTC),
                      seed=3)
    base = MigrateOptions(previews=False, catalog=False, row_group_points=4_096)
    a = migrate(str(src), str(tmp_path / "a"), crs="EPSG:32633", options=base)
    b = migrate(str(src), str(tmp_path / "b"), crs="EPSG:32633", previews=False, catalog=False, row_group_points=4_096)
    for shelf in ("a", "b"):
        assert not (tmp_path / shelf / "previews").exists() and not (tmp_path / shelf / "catalog.json").exists()
        (path,) = (tmp_path / shelf / "points").rglob("*.parquet")
        assert pq.ParquetFile(path).metadata.row_group(0).num_rows == 4_096  # the option reached the writer
    assert a.converted == b.converted == ["north-20260901T060000Z"]
    with pytest.raises(TypeError):
        migrate(str(src), str(tmp_path / "c"), options=base, no_such_setting=1)
