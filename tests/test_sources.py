"""One reader test suite, run against LAS 1.4, LAS 1.2, LAZ and ASCII sources."""

from __future__ import annotations

from decimal import Decimal

import fsspec
import laspy
import numpy as np
import pyarrow as pa
import pytest

from archive.points.coords import units_of
from archive.sitefile import SiteFile
from archive.sources import DamagedSource, SourceError, classify, open_points
from tests import factory


def _reader(path):
    fs = fsspec.filesystem("file")
    head = path.read_bytes()[:4096]
    return open_points(fs, str(path), path.name, path.stat().st_size, head, SiteFile())


def _read_all(reader, **kw) -> pa.Table:
    return pa.concat_tables(list(reader.chunks(chunk_size=7_000, **kw)))


class ReaderContract:
    """What every reader must do; subclasses make the file."""

    n = 20_000

    def make(self, tmp_path):
        raise NotImplementedError

    def test_every_point_once_in_chunks(self, tmp_path):
        path, _ = self.make(tmp_path)
        table = _read_all(_reader(path))
        assert table.num_rows == self.n
        assert [f.name for f in table.schema][:3] == ["x", "y", "z"]
        assert all(pa.types.is_decimal(table.schema.field(a).type) for a in "xyz")

    def test_coordinates_are_exact(self, tmp_path):
        path, reference = self.make(tmp_path)
        reader = _reader(path)
        table = _read_all(reader)
        for axis in "xyz":
            enc = reader.header.axes[axis]
            floats = enc.to_float(units_of(table.column(axis)))
            np.testing.assert_array_equal(floats, reference[axis])

    def test_intensity_kept_with_values(self, tmp_path):
        path, reference = self.make(tmp_path)
        table = _read_all(_reader(path))
        np.testing.assert_array_equal(table.column("intensity").to_numpy(), reference["intensity"])


class TestLas14(ReaderContract):
    def make(self, tmp_path):
        las = factory.write_las(tmp_path / "a.las", self.n, factory.utc(2026, 9, 1, 6))
        return tmp_path / "a.las", {"x": las.x, "y": las.y, "z": las.z, "intensity": las.intensity}

    def test_decimal_equals_las_formula(self, tmp_path):
        # reference: ASPRS LAS 1.4 specification, coordinate = X * scale + offset (exact decimal arithmetic)
        path, _ = self.make(tmp_path)
        raw = laspy.read(str(path))
        table = _read_all(_reader(path))
        scale, offset = Decimal(repr(float(raw.header.scales[0]))), Decimal(repr(float(raw.header.offsets[0])))
        got = table.column("x").to_pylist()[:500]
        want = [int(X) * scale + offset for X in raw.X[:500]]
        assert got == want

    def test_extra_bytes_and_time_kept(self, tmp_path):
        path, _ = self.make(tmp_path)
        raw = laspy.read(str(path))  # reference: laspy
        reader = _reader(path)
        table = _read_all(reader)
        assert table.schema.field("deviation").type == pa.float32()
        np.testing.assert_array_equal(table.column("deviation").to_numpy(), raw.deviation)
        np.testing.assert_array_equal(table.column("gps_time").to_numpy(), raw.gps_time)
        assert reader.header.adjusted_gps_time
        assert reader.tally.min_time == raw.gps_time.min()


class TestLas12(ReaderContract):
    def make(self, tmp_path):
        las = factory.write_las(tmp_path / "a.las", self.n, factory.utc(2026, 9, 1, 6), version="1.2",
                                point_format=1, extra=False)
        return tmp_path / "a.las", {"x": las.x, "y": las.y, "z": las.z, "intensity": las.intensity}

    def test_week_time_is_not_absolute(self, tmp_path):
        path, _ = self.make(tmp_path)
        assert not _reader(path).header.adjusted_gps_time


class TestLaz(ReaderContract):
    def make(self, tmp_path):
        las = factory.write_las(tmp_path / "a.laz", self.n, factory.utc(2026, 9, 1, 6), point_format=7)
        return tmp_path / "a.laz", {"x": las.x, "y": las.y, "z": las.z, "intensity": las.intensity}

    def test_format_is_laz(self, tmp_path):
        path, _ = self.make(tmp_path)
        assert _reader(path).header.format == "laz"


class TestAscii(ReaderContract):
    delimiter = ","

    def make(self, tmp_path):
        p = factory.write_csv(tmp_path / "a.csv", self.n, delimiter=self.delimiter)
        # a text export holds 3 decimals: the reference is the value as printed
        return tmp_path / "a.csv", {a: np.array([float(f"{v:.3f}") for v in p[a]]) for a in "xyz"} | {
            "intensity": p["intensity"]}

    def test_bad_rows_refused_then_salvaged(self, tmp_path):
        factory.write_csv(tmp_path / "b.csv", 1000, bad_rows=3, delimiter=self.delimiter)
        with pytest.raises(DamagedSource, match="b.csv: 3 malformed"):
            _read_all(_reader(tmp_path / "b.csv"))
        reader = _reader(tmp_path / "b.csv")
        assert _read_all(reader, salvage=True).num_rows == 1000
        assert reader.tally.problems == ["3 malformed or non-numeric rows skipped"]


class TestAsciiSpaces(TestAscii):
    delimiter = " "


class TestAsciiSemicolonBom(TestAscii):
    delimiter = ";"

    def make(self, tmp_path):
        path, ref = super().make(tmp_path)
        path.write_bytes(b"\xef\xbb\xbf" + path.read_bytes())
        return path, ref


def test_truncated_las_refused_then_salvaged(tmp_path):
    factory.write_las(tmp_path / "t.las", 10_000, factory.utc(2026, 9, 1, 6))
    data = (tmp_path / "t.las").read_bytes()
    record = laspy.read(str(tmp_path / "t.las")).header.point_format.size
    (tmp_path / "t.las").write_bytes(data[: len(data) - 100 * record - 5])
    reader = _reader(tmp_path / "t.las")
    assert "truncated" in reader.header.problems[0]
    with pytest.raises(DamagedSource, match="t.las: header declares 10000 points but the file holds 9899"):
        _read_all(reader)
    assert _read_all(_reader(tmp_path / "t.las"), salvage=True).num_rows == 9899


def test_header_count_larger_than_data(tmp_path):
    factory.write_las(tmp_path / "c.las", 5_000, factory.utc(2026, 9, 1, 6))
    with laspy.open(str(tmp_path / "c.las"), mode="r") as f:
        count_at = 247  # LAS 1.4 header: number of point records (uint64) — ASPRS LAS 1.4 Table 3
        assert f.header.point_count == 5000
    data = bytearray((tmp_path / "c.las").read_bytes())
    data[count_at : count_at + 8] = (6000).to_bytes(8, "little")
    (tmp_path / "c.las").write_bytes(bytes(data))
    reader = _reader(tmp_path / "c.las")
    assert any("declares 6000 points but the file holds 5000" in p for p in reader.header.problems)


def test_classify():
    assert classify("a/b.las", b"LASF....") == "points"
    assert classify("a/notes.txt", b"field notes, not data\n") == "other"
    assert classify("a/pts.txt", b"1.0 2.0 3.0\n4.0 5.0 6.0\n") == "points"
    assert classify("a/dem.asc", b"ncols 10\nnrows 10\n") == "grid"
    assert classify("a/dem.tif", b"II*\x00") == "grid"
    assert classify("a/dem.prj", b"PROJCS[") == "sidecar"


def test_text_without_xyz_names_the_fix(tmp_path):
    (tmp_path / "odd.csv").write_text("a,b,c\n1,2,3\n4,5,6\n")
    with pytest.raises(SourceError, match=r"odd.csv: no x, y, z column .* site file"):
        _reader(tmp_path / "odd.csv")
