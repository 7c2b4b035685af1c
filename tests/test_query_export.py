"""extract and find from the command line; LAS/LAZ output checked with laspy."""

from __future__ import annotations

import json
import os
from decimal import Decimal

import duckdb
import laspy
import numpy as np
import pyarrow as pa
import pyarrow.csv as pcsv
import pyarrow.parquet as pq
import pytest
from click.testing import CliRunner

from archive.cli.query import extract as extract_command
from archive.cli.query import find as find_command
from archive.points.coords import AxisEncoding
from archive.query import open_shelf
from archive.query.export import extract
from tests.servers import BOX, CRS_CODE, shelf_dir  # noqa: F401 (fixtures)


def duckdb_count(paths, box) -> int:
    # reference: DuckDB's own Parquet reader and SQL filter (fetchall: an unfinished result would
    # block DuckDB's shared default connection for the next test in this process)
    return duckdb.execute(
        "SELECT count(*) FROM read_parquet(?) WHERE x BETWEEN ? AND ? AND y BETWEEN ? AND ?",
        [[str(p) for p in paths], box[0], box[2], box[1], box[3]],
    ).fetchall()[0][0]  # fetchone() would leave the default connection busy for the next test's duckdb.sql


def test_las_integers_round_trip(shelf_dir, tmp_path):
    root, scans = shelf_dir
    out = tmp_path / "north.las"
    result = extract(str(root), str(out), BOX, station="north", end="2026-03-01")
    las = laspy.read(out)  # reference: laspy, an independent LAS reader
    assert las.header.version.minor == 4 and las.header.point_format.id == 6
    assert las.header.parse_crs().to_epsg() == int(CRS_CODE.split(":")[1])
    assert len(las.points) == result.points == duckdb_count([scans[0]["path"]], BOX)
    axes = scans[0]["axes"]
    np.testing.assert_array_equal(las.header.scales, [axes[a]["scale"] for a in "xyz"])
    np.testing.assert_array_equal(las.header.offsets, [axes[a]["offset"] for a in "xyz"])
    # reference: DuckDB reads the stored decimals; ASPRS LAS 1.4 gives X = (x - offset) / scale, in exact
    # decimal arithmetic: the integers laspy reads must be those, and whole numbers
    rows = duckdb.execute(
        "SELECT x::VARCHAR, y::VARCHAR, z::VARCHAR, intensity FROM read_parquet(?) "
        "WHERE x BETWEEN ? AND ? AND y BETWEEN ? AND ?",
        [str(scans[0]["path"]), BOX[0], BOX[2], BOX[1], BOX[3]],
    ).fetchall()
    want = []
    for *xyz, intensity in rows:
        ints = [(Decimal(v) - Decimal(repr(axes[a]["offset"]))) / Decimal(repr(axes[a]["scale"])) for v, a in zip(xyz, "xyz")]
        assert all(i == i.to_integral_value() for i in ints)
        want.append((*map(int, ints), intensity))
    got = list(zip(*(np.asarray(v).tolist() for v in (las.X, las.Y, las.Z, las.intensity))))
    assert sorted(got) == sorted(want)


def test_laz_of_mixed_scans(shelf_dir, tmp_path):
    root, scans = shelf_dir
    out = tmp_path / "all.laz"
    result = extract(str(root), str(out), BOX, columns=["intensity", "gps_time"])
    las = laspy.read(out)  # reference: laspy with the lazrs backend
    assert las.header.are_points_compressed
    assert len(las.points) == result.points == duckdb_count([s["path"] for s in scans], BOX)
    assert result.scans == 3
    # every coordinate is an exact decimal at the millimetre: X * 0.001 + offset reproduces it
    x = np.asarray(las.X, np.int64) + round(las.header.offsets[0] / las.header.scales[0])
    got = sorted(x.tolist())
    want = duckdb.execute(
        "SELECT (x * 1000)::BIGINT FROM read_parquet(?) WHERE x BETWEEN ? AND ? AND y BETWEEN ? AND ? ORDER BY 1",
        [[str(s["path"]) for s in scans], BOX[0], BOX[2], BOX[1], BOX[3]],
    ).fetchall()
    assert got == [w[0] for w in want]


def test_parquet_and_csv_keep_exact_decimals(shelf_dir, tmp_path):
    root, scans = shelf_dir
    pq_out, csv_out = tmp_path / "cut.parquet", tmp_path / "cut.csv"
    extract(str(root), str(pq_out), BOX, columns=["classification"])
    extract(str(root), str(csv_out), BOX, columns=["classification"])
    table = pq.read_table(pq_out)
    assert pa.types.is_decimal(table["x"].type)
    assert table.column_names == ["x", "y", "z", "classification", "scan_id"]
    assert table.num_rows == duckdb_count([s["path"] for s in scans], BOX)
    text = pcsv.read_csv(csv_out, convert_options=pcsv.ConvertOptions(column_types={"x": pa.string()}))
    assert sorted(text["x"].to_pylist()) == sorted(table["x"].cast(pa.string()).to_pylist())
    assert all(len(v.split(".")[1]) == 3 for v in text["x"].to_pylist()[:50])


def test_extract_refuses_unknown_types_and_empty_windows(shelf_dir, tmp_path):
    root, _ = shelf_dir
    with pytest.raises(ValueError, match="unknown output type"):
        extract(str(root), str(tmp_path / "x.xyz"), BOX)
    with pytest.raises(ValueError, match="no points inside"):
        extract(str(root), str(tmp_path / "x.las"), (0, 0, 1, 1))
    assert list(tmp_path.iterdir()) == []  # nothing half-written


def test_find_command(shelf_dir):
    root, _ = shelf_dir
    runner = CliRunner()
    table = runner.invoke(find_command, [str(root), "--station", "north"])
    assert table.exit_code == 0, table.output
    assert "north-20260301T060000Z" in table.output and "south" not in table.output.split("\n")[1]
    as_json = runner.invoke(find_command, [str(root), "--bbox", *map(str, BOX), "--start", "2026-03-02", "--json"])
    assert as_json.exit_code == 0, as_json.output
    items = json.loads(as_json.stdout)
    assert [i["id"] for i in items] == ["south-20260304T123000Z", "north-20260308T060000Z"]


def test_extract_command(shelf_dir, tmp_path):
    root, scans = shelf_dir
    out = tmp_path / "cut.las"
    result = CliRunner().invoke(
        extract_command,
        [str(root), "--bbox", *map(str, BOX), "--columns", "intensity", "-o", str(out)],
    )
    assert result.exit_code == 0, result.output
    assert "bytes fetched" in result.output
    assert len(laspy.read(out).points) == duckdb_count([s["path"] for s in scans], BOX)
    umask = os.umask(0o022)
    os.umask(umask)
    assert out.stat().st_mode & 0o777 == 0o666 & ~umask  # an ordinary file (reference: POSIX open(2) with umask)
    missing = CliRunner().invoke(extract_command, [str(root), "-o", str(tmp_path / "a.las")])
    assert missing.exit_code != 0 and "--bbox" in missing.output


def test_extract_a_central_fraction(shelf_dir, tmp_path):
    root, scans = shelf_dir
    out = tmp_path / "centre.parquet"
    result = CliRunner().invoke(extract_command, [str(root), "--bbox-fraction", "0.04", "--station", "south",
                                                  "-q", "-o", str(out)])
    assert result.exit_code == 0, result.output
    table = pq.read_table(out)
    x = table["x"].cast(pa.float64()).to_numpy()
    # the south scan spans ~200 m: a 4% centred box is ~40 m wide around the middle
    box = open_shelf(str(root)).find(station="south").central_bbox(0.04)
    assert box[2] - box[0] == pytest.approx(40.0, abs=0.1)
    assert x.min() >= box[0] and x.max() <= box[2]
    assert table.num_rows == duckdb_count([scans[2]["path"]], box) > 0


def _decimal_table(scans: list[tuple[str, list[str]]]) -> pa.Table:
    """x = y = z = the given decimal texts, one scan after the other (the shape a shelf read gives)."""
    places = max(len(t.split(".")[1]) if "." in t else 0 for _, texts in scans for t in texts)
    values = [Decimal(t) for _, texts in scans for t in texts]
    column = pa.array(values, pa.decimal128(18, places))
    ids = [sid for sid, texts in scans for _ in texts]
    return pa.table({"x": column, "y": column, "z": column, "scan_id": pa.array(ids)})


def _las_decimals(las, axis: int, ints) -> list:
    """ASPRS LAS 1.4: coordinate = X * scale + offset, evaluated in exact decimal arithmetic."""
    scale, offset = Decimal(repr(float(las.header.scales[axis]))), Decimal(repr(float(las.header.offsets[axis])))
    return [int(i) * scale + offset for i in ints]


def test_laz_of_mixed_precision_picks_scale_and_offset_from_the_points(tmp_path):
    from archive.query.export import _write_las

    # a LAS scan at the millimetre far from its offset, and a text scan at 0.1 mm (offset 0)
    mm = ["511234.567", "511300.001", "511299.999"]
    tenth = ["511250.1234", "511260.0001"]
    table = _decimal_table([("a", mm), ("b", tenth)])
    axes = [{a: AxisEncoding.for_las(0.001, 0.0) for a in "xyz"}, {a: AxisEncoding.for_text(4) for a in "xyz"}]
    out = tmp_path / "mixed.laz"
    _write_las(table, str(out), axes, None, {}, compress=True)
    las = laspy.read(out)  # reference: laspy with the lazrs backend
    for axis, ints in enumerate((las.X, las.Y, las.Z)):
        assert np.all(np.abs(np.asarray(ints, np.int64)) < 2**31)  # reference: ASPRS LAS 1.4, signed 32-bit X
        assert _las_decimals(las, axis, ints) == [Decimal(t) for t in mm + tenth]
    assert float(las.header.scales[0]) == 0.0001  # the finest step any point needs, no finer
    assert 511000 <= las.header.offsets[0] <= 511300  # near the points, not at 0


def test_laz_says_when_range_and_exactness_cannot_both_hold(tmp_path):
    from archive.query.export import _write_las

    # 10,000 km at 0.1 mm needs 10^11 steps: more than 2^32
    table = _decimal_table([("a", ["0.0001", "0.0002", "10000000.0001"])])
    axes = [{a: AxisEncoding.for_text(4) for a in "xyz"}]
    with pytest.raises(ValueError, match=r"x: the points span 10000000\.0000 at a precision of 0\.0001, more than"):
        _write_las(table, str(tmp_path / "far.las"), axes, None, {})
