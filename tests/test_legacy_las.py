"""LAS/LAZ files as other programs write them: any scale and offset, waveform formats, times from
paths and headers, mixed extents, local frames. Every file is built with laspy (the reference)."""

from __future__ import annotations

from datetime import datetime, timezone
from pathlib import Path

import duckdb
import laspy
import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pyproj
import pytest

import archive
from archive.migrate import migrate
from archive.query.export import extract
from archive.query.points import join_scans
from archive.points.coords import AxisEncoding

CRS = "EPSG:32633"


def _las(path: Path, *, scales, offsets, n: int = 5_000, point_format: int = 6, version: str = "1.4",
         centre=(500_100.0, 7_650_100.0, 40.0), gps=None, crs: str | None = CRS, seed: int = 0, spread: float = 30.0, week_seconds: float = 3 * 86400.0 + 7200.0,
         created=False) -> laspy.LasData:
    """A laspy-built file; ``gps`` is the first point's adjusted standard GPS time (None: week time,
    starting at ``week_seconds``); ``created`` a header creation date (None: blank; False: laspy's)."""
    rng = np.random.default_rng(seed)
    header = laspy.LasHeader(point_format=point_format, version=version)
    header.scales = np.array(scales, dtype=np.float64)
    header.offsets = np.array(offsets, dtype=np.float64)
    if gps is not None:
        header.global_encoding.gps_time_type = laspy.header.GpsTimeType.STANDARD
    if crs:
        header.add_crs(pyproj.CRS(crs))
    las = laspy.LasData(header)
    las.x = centre[0] + rng.uniform(-spread, spread, n)
    las.y = centre[1] + rng.uniform(-spread, spread, n)
    las.z = centre[2] + rng.normal(0, 2, n)
    las.intensity = rng.integers(0, 65535, n).astype(np.uint16)
    if "gps_time" in las.point_format.dimension_names:
        las.gps_time = (gps if gps is not None else week_seconds) + np.arange(n) * 1e-4
    path.parent.mkdir(parents=True, exist_ok=True)
    las.write(str(path))
    if created is not False:
        _set_creation_date(path, created)
    return laspy.read(str(path))  # what a reader sees: the stored integers, scaled


def _set_creation_date(path: Path, day) -> None:
    """Header creation day of year (uint16 at byte 90) and year (uint16 at 92), ASPRS LAS 1.2-1.4."""
    import struct

    data = bytearray(path.read_bytes())
    doy, year = (day.timetuple().tm_yday, day.year) if day is not None else (0, 0)
    struct.pack_into("<HH", data, 90, doy, year)
    path.write_bytes(bytes(data))


def _scan_table(shelf: Path, stem: str) -> pa.Table:
    return pq.read_table(next((shelf / "points").rglob(f"{stem}.parquet")))


# --- 1. any scale and offset ------------------------------------------------------------------

SCALES = [
    ((1.16451354e-06, 1.16451002e-06, 1.00314324e-06), (500_000.352, 7_650_000.596, 7.194653)),
    ((1.0000000000000002e-06,) * 3, (500_000.0, 7_650_000.0, 0.0)),
    ((0.0025, 0.0025, 0.0025), (499_999.9975, 7_650_000.0, -3.0)),
]


@pytest.mark.parametrize("scales,offsets", SCALES)
def test_any_scale_converts_bit_identical_to_laspy(tmp_path, scales, offsets):
    src, shelf = tmp_path / "src", tmp_path / "shelf"
    las = _las(src / "st/scan_20160501_101500.las", scales=scales, offsets=offsets,
               gps=1.146e9 - 1e9 + 0.5)  # GPS 2016-04-30
    result = migrate(str(src), str(shelf), previews=False)
    assert result.failed == [] and len(result.converted) == 1, result.summary()
    found = archive.open_shelf(str(shelf)).find()
    got = found.read_points()
    # reference: laspy's las.x (= X*scale+offset, ASPRS LAS 1.4), bit for bit, every point once
    want = np.stack([las.x, las.y, las.z, las.gps_time], axis=1)
    have = np.stack([got[a].to_numpy() for a in ("x", "y", "z", "gps_time")], axis=1)
    np.testing.assert_array_equal(have[np.lexsort(have.T[::-1])], want[np.lexsort(want.T[::-1])])
    # the integers come back: round((x - offset)/scale) == X for every point (reference: laspy las.X)
    stored = _scan_table(shelf, found.scans[0].id if hasattr(found, "scans") else found[0].id)
    for i, (axis, raw) in enumerate(zip("xyz", ("X", "Y", "Z"))):
        enc = AxisEncoding.for_las(scales[i], offsets[i])
        back = np.rint((np.asarray(have[:, i]) - offsets[i]) / scales[i]).astype(np.int64)
        order_back = np.sort(back)
        np.testing.assert_array_equal(order_back, np.sort(np.asarray(las.points[raw], dtype=np.int64)))
        assert stored.schema.field(axis).type == enc.type


def test_power_of_ten_scale_stays_decimal_and_odd_scale_is_float(tmp_path):
    assert pa.types.is_decimal(AxisEncoding.for_las(0.001, 500_000.0).type)
    assert pa.types.is_decimal(AxisEncoding.for_las(0.0025, 500_000.0).type)
    assert AxisEncoding.for_las(1.16451354e-06, 1_692_500.352).type == pa.float64()
    assert AxisEncoding.for_las(1.0000000000000002e-06, 0.0).type == pa.float64()


def test_duckdb_sees_real_coordinates_for_odd_scales(tmp_path):
    src, shelf = tmp_path / "src", tmp_path / "shelf"
    las = _las(src / "st/scan_20160501_101500.las", scales=SCALES[0][0], offsets=SCALES[0][1], gps=1.146e9 - 1e9)
    migrate(str(src), str(shelf), previews=False)
    path = next((shelf / "points").rglob("*.parquet"))
    # reference: DuckDB reading the Parquet file as is, against laspy's coordinates
    con = duckdb.connect()  # its own connection: the module's default one is shared by other tests
    try:
        lo, hi = con.sql(f"select min(x), max(x) from read_parquet('{path}')").fetchall()[0]
    finally:
        con.close()
    assert (lo, hi) == (float(las.x.min()), float(las.x.max()))


def test_las_columns_are_required(tmp_path):
    """Every LAS point has every field, so each column is REQUIRED (no definition levels)."""
    src, shelf = tmp_path / "src", tmp_path / "shelf"
    las = _las(src / "st/scan_20160501_101500.las", scales=(0.001,) * 3, offsets=(500_000.0, 7_650_000.0, 0.0),
               gps=1.146e9 - 1e9, n=3_000)
    migrate(str(src), str(shelf), previews=False)
    path = next((shelf / "points").rglob("*.parquet"))
    con = duckdb.connect()
    try:
        # reference: DuckDB's parquet_schema(), the repetition type of every leaf column
        kinds = {row[0] for row in con.sql(
            f"select repetition_type from parquet_schema('{path}') where num_children is null").fetchall()}
        total = con.sql(f"select sum(intensity)::BIGINT from read_parquet('{path}')").fetchall()[0][0]
    finally:
        con.close()
    assert kinds == {"REQUIRED"}
    assert total == int(las.intensity.astype(np.int64).sum())  # reference: laspy


def test_scans_of_different_point_formats_read_as_one_table(tmp_path):
    """A column REQUIRED in one scan (format 6 'overlap') and absent from another (format 1) reads
    as nulls for the other scan's points, in read_points and in extract."""
    src, shelf = tmp_path / "src", tmp_path / "shelf"
    six = _las(src / "st/scan_20160501_101500.las", scales=(0.001,) * 3, offsets=(500_000.0, 7_650_000.0, 0.0),
               gps=1.146e9 - 1e9, n=3_000)
    one = _las(src / "st/scan_20160502_101500.las", scales=(0.001,) * 3, offsets=(500_000.0, 7_650_000.0, 0.0),
               gps=1.146e9 - 1e9 + 86400, n=2_000, seed=1, point_format=1, version="1.2")
    migrate(str(src), str(shelf), previews=False)
    got = archive.open_shelf(str(shelf)).find().read_points()
    # reference: laspy's point counts of the two files; only format 6 has an overlap bit
    assert got.num_rows == len(six.points) + len(one.points)
    assert got["overlap"].null_count == len(one.points)
    cut = extract(str(shelf), str(tmp_path / "all.parquet"), bbox_fraction=1.0)
    assert cut.points == got.num_rows
    assert pq.read_table(tmp_path / "all.parquet", columns=["overlap"])["overlap"].null_count == len(one.points)


def test_join_of_required_and_optional_columns_of_one_name():
    """A scan written with REQUIRED columns joins one written with OPTIONAL ones (earlier
    versions) and one without the column."""
    required = pa.schema([pa.field("x", pa.float64(), nullable=False), pa.field("overlap", pa.uint8(), nullable=False)])
    new = pa.Table.from_arrays([pa.array([1.0, 2.0]), pa.array([1, 0], pa.uint8())], schema=required)
    old = pa.table({"x": [3.0], "overlap": pa.array([1], pa.uint8())})
    without = pa.table({"x": [4.0]})
    joined = join_scans([new, old, without])
    assert joined.column("x").to_pylist() == [1.0, 2.0, 3.0, 4.0]
    assert joined.column("overlap").to_pylist() == [1, 0, 1, None]


ODD = 1.0000000000000002e-09  # not a short decimal: a float axis


def test_integers_kept_where_float_cannot_give_them_back(tmp_path):
    # a scale far below the float64 spacing at the offset: distinct X share one float value
    enc = AxisEncoding.for_las(1e-12, 1e6)
    assert enc.kind == "float" and enc.raw
    src, shelf = tmp_path / "src", tmp_path / "shelf"
    las = _las(src / "st/scan_20160501_101500.las", scales=(ODD, ODD, 0.001), offsets=(2_500_100.0, 7_650_100.0, 0.0),
               gps=1.146e9 - 1e9, n=2_000, centre=(2_500_100.0, 7_650_100.0, 40.0), spread=1.0)
    result = migrate(str(src), str(shelf), previews=False)
    assert result.failed == [], result.summary()
    table = _scan_table(shelf, result.converted[0])
    assert AxisEncoding.for_las(ODD, 2_500_100.0).raw and AxisEncoding.for_las(ODD, 7_650_100.0).raw
    assert "x_raw" in table.column_names and "z_raw" not in table.column_names
    # reference: laspy's stored integers X, Y
    np.testing.assert_array_equal(np.sort(table["x_raw"].to_numpy()), np.sort(np.asarray(las.points["X"])))
    np.testing.assert_array_equal(np.sort(table["y_raw"].to_numpy()), np.sort(np.asarray(las.points["Y"])))


# --- 2. waveform point formats ----------------------------------------------------------------

WAVE_FIELDS = ("wavepacket_index", "wavepacket_offset", "wavepacket_size", "return_point_wave_location", "x_t", "y_t", "z_t")


def _with_wave_packets(path: Path, version: str, samples: bytes) -> None:
    """Append a waveform data packet record after the points and point the header at it (ASPRS LAS
    1.3/1.4: global encoding bit 1, start of waveform data packet record at byte 227; in 1.4 the
    record is the first EVLR, user id LASF_Spec, record id 65535)."""
    import struct

    data = bytearray(path.read_bytes())
    start = len(data)
    evlr = struct.pack("<H16sHQ32s", 0, b"LASF_Spec", 65535, len(samples), b"waveform samples")
    data += evlr + samples
    encoding = struct.unpack_from("<H", data, 6)[0] | 0b10
    struct.pack_into("<H", data, 6, encoding)
    struct.pack_into("<Q", data, 227, start)
    if version == "1.4":
        struct.pack_into("<QI", data, 235, start, 1)
    path.write_bytes(bytes(data))


@pytest.mark.parametrize("point_format,version", [(4, "1.3"), (5, "1.3"), (9, "1.4"), (10, "1.4")])
def test_waveform_formats_convert_with_descriptors(tmp_path, point_format, version):
    src, shelf = tmp_path / "src", tmp_path / "shelf"
    path = src / "st/scan_20160501_101500.las"
    _las(path, scales=(0.001,) * 3, offsets=(500_000.0, 7_650_000.0, 0.0), point_format=point_format,
         version=version, n=3_000)
    las = laspy.read(str(path))
    las.wavepacket_index = np.ones(len(las.points), np.uint8)
    las.wavepacket_offset = np.arange(len(las.points), dtype=np.uint64) * 64 + 60
    las.wavepacket_size = np.full(len(las.points), 64, np.uint32)
    las.return_point_wave_location = np.linspace(0, 100, len(las.points)).astype(np.float32)
    las.x_t = np.full(len(las.points), 0.25, np.float32)
    las.write(str(path))
    _with_wave_packets(path, version, bytes(64 * len(las.points)))
    las = laspy.read(str(path))  # reference: laspy reads the file with its wave packets
    result = migrate(str(src), str(shelf), previews=False)
    assert result.failed == [] and len(result.converted) == 1, result.summary()
    table = _scan_table(shelf, result.converted[0])
    order = np.argsort(table["gps_time"].to_numpy())  # gps_time rises through the file
    for name in WAVE_FIELDS:
        np.testing.assert_array_equal(table[name].to_numpy()[order], np.asarray(las.points[name]))
    survey = pq.read_table(shelf / "survey.parquet").to_pylist()[0]
    assert survey["status"] == "ok"
    assert any("waveform samples, inside the file" in n and "not carried" in n for n in survey["notes"])


def test_external_waveform_file_is_named_and_not_an_unknown_file(tmp_path):
    src = tmp_path / "src"
    path = src / "st/scan_20160501_101500.las"
    _las(path, scales=(0.001,) * 3, offsets=(500_000.0, 7_650_000.0, 0.0), point_format=9, n=500)
    las = laspy.read(str(path))
    las.header.global_encoding.waveform_data_packets_external = True
    las.write(str(path))
    (src / "st/scan_20160501_101500.wdp").write_bytes(b"\0" * 128)
    result = archive.survey(str(src))
    by_path = {f.relpath: f for f in result.files}
    assert by_path["st/scan_20160501_101500.las"].status == "ok"
    assert "external file st/scan_20160501_101500.wdp" in by_path["st/scan_20160501_101500.las"].notes[0]
    assert by_path["st/scan_20160501_101500.wdp"].kind == "sidecar"
    assert "not carried" in result.summary()


# --- 3. scan time from what real files carry --------------------------------------------------

def _astropy():
    pytest.importorskip("astropy")
    from astropy.time import Time
    from astropy.utils import iers

    iers.conf.auto_download = False  # the leap-second table shipped with astropy-iers-data; offline
    return Time


LEAP_DAYS = ["1981-07-01", "1982-07-01", "1983-07-01", "1985-07-01", "1988-01-01", "1990-01-01", "1991-01-01",
             "1992-07-01", "1993-07-01", "1994-07-01", "1996-01-01", "1997-07-01", "1999-01-01", "2006-01-01",
             "2009-01-01", "2012-07-01", "2015-07-01", "2017-01-01"]


def test_gps_to_utc_across_every_leap_second_matches_astropy():
    from datetime import timedelta

    from archive.timeutil import adjusted_gps_to_utc, gps_minus_utc, utc_to_adjusted_gps

    Time = _astropy()
    for day in LEAP_DAYS:
        midnight = datetime.fromisoformat(day).replace(tzinfo=timezone.utc)
        for shift in (-86400 * 30, -2, -1, 0, 1, 2, 86400 * 30):
            when = midnight + timedelta(seconds=shift)
            # reference: astropy.time (UTC -> GPS seconds since 1980-01-06, its own leap-second table)
            gps = Time(when.strftime("%Y-%m-%dT%H:%M:%S"), scale="utc").gps
            assert utc_to_adjusted_gps(when) == gps - 1e9, when
            assert adjusted_gps_to_utc(gps - 1e9) == when, when
    # a 2012 scan gets the 2012 offset, not today's 18 s (reference: astropy, GPS - UTC = TAI - UTC - 19)
    may_2012 = Time("2012-05-01T00:00:00", scale="utc")
    assert gps_minus_utc(datetime(2012, 5, 1, tzinfo=timezone.utc)) == round(
        (may_2012.tai.mjd - may_2012.utc.mjd) * 86400 - 19) == 15


@pytest.mark.parametrize("folder", ["2016-05-01", "20160501", "2016/05/01", "site/2016_05_01"])
def test_gps_week_time_resolved_with_the_date_of_any_folder(tmp_path, folder):
    Time = _astropy()
    src, shelf = tmp_path / "src", tmp_path / "shelf"
    # 2016-05-01 is a Sunday; 10:15:00 UTC. GPS week seconds from astropy (reference)
    when = Time("2016-05-01T10:15:00", scale="utc")
    week_seconds = when.gps % (7 * 86400)
    _las(src / "st" / folder / "scan.las", scales=(0.001,) * 3, offsets=(500_000.0, 7_650_000.0, 0.0),
         point_format=1, version="1.2", week_seconds=week_seconds, created=None)
    result = migrate(str(src), str(shelf), crs=CRS, previews=False)
    assert result.failed == [] and result.converted == ["st-20160501T101500Z"], result.summary()
    item = next((shelf / "scans/items").rglob("*.json")).read_text()
    assert '"scanshelf:time_source": "gps_week"' in item and '"scanshelf:time_approximate": false' in item


def test_time_stamp_in_a_folder_and_date_only_paths(tmp_path):
    src = tmp_path / "src"
    common = dict(scales=(0.001,) * 3, offsets=(500_000.0, 7_650_000.0, 0.0), point_format=0, version="1.2", created=None)
    _las(src / "a/2016-05-01_10-15-00/scan.las", **common)
    _las(src / "b/2016/05/02/scan.las", **common, seed=1)
    _las(src / "c/scan.las", **{**common, "created": datetime(2014, 3, 9).date()}, seed=2)
    _las(src / "d/scan.las", **common, seed=3)
    files = {f.relpath: f for f in archive.survey(str(src), crs=CRS).files}
    utc = timezone.utc
    assert (files["a/2016-05-01_10-15-00/scan.las"].scan_time, files["a/2016-05-01_10-15-00/scan.las"].time_source) == (
        datetime(2016, 5, 1, 10, 15, tzinfo=utc), "path")
    assert (files["b/2016/05/02/scan.las"].scan_time, files["b/2016/05/02/scan.las"].time_source) == (
        datetime(2016, 5, 2, tzinfo=utc), "path_date")
    assert (files["c/scan.las"].scan_time, files["c/scan.las"].time_source) == (datetime(2014, 3, 9, tzinfo=utc), "header_date")
    d = files["d/scan.las"]
    assert d.status == "unusable" and d.scan_time is None
    assert "[times] \"d/scan.las\" = " in "; ".join(d.problems)


def test_week_time_with_only_a_header_date_and_the_site_file_last(tmp_path):
    from archive.sitefile import parse_site_file

    Time = _astropy()
    src = tmp_path / "src"
    when = Time("2014-03-09T16:00:00", scale="utc")  # reference: astropy GPS seconds
    _las(src / "c/scan.las", scales=(0.001,) * 3, offsets=(500_000.0, 7_650_000.0, 0.0), point_format=1,
         version="1.2", week_seconds=when.gps % (7 * 86400), created=datetime(2014, 3, 10).date())
    _las(src / "d/scan.las", scales=(0.001,) * 3, offsets=(500_000.0, 7_650_000.0, 0.0), point_format=0,
         version="1.2", created=None, seed=1)
    site = parse_site_file({"site": {"crs": CRS, "timezone": "Europe/Oslo"}, "times": {"d/*.las": "2015-06-01T12:00:00"}})
    files = {f.relpath: f for f in archive.survey(str(src), site).files}
    assert (files["c/scan.las"].scan_time, files["c/scan.las"].time_source) == (
        datetime(2014, 3, 9, 16, tzinfo=timezone.utc), "gps_week_header")
    assert (files["d/scan.las"].scan_time, files["d/scan.las"].time_source) == (
        datetime(2015, 6, 1, 10, tzinfo=timezone.utc), "site_file")  # 12:00 CEST


# --- 4. folders that mix sites ----------------------------------------------------------------

def test_station_folder_mixing_places_and_crs_converts_every_scan(tmp_path):
    import xarray as xr

    from archive.grids.spec import MAX_CELLS

    src, shelf = tmp_path / "src", tmp_path / "shelf"
    common = dict(scales=(0.001,) * 3, offsets=(500_000.0, 7_650_000.0, 0.0), n=3_000)
    near_a = _las(src / "st/a_20160501_101500.las", **common, gps=None, seed=1)
    near_b = _las(src / "st/b_20160502_101500.las", **common, gps=None, seed=2, centre=(500_140.0, 7_650_100.0, 40.0))
    far = _las(src / "st/c_20160503_101500.las", **common, gps=None, seed=3, centre=(900_100.0, 7_150_100.0, 40.0))
    other = _las(src / "st/d_20160504_101500.las", scales=(0.01,) * 3, offsets=(0.0, 0.0, 0.0), n=2_000, gps=None,
                 seed=4, crs="EPSG:25832", centre=(300_000.0, 5_600_000.0, 10.0))
    result = migrate(str(src), str(shelf), previews=False)
    assert result.failed == [] and len(result.converted) == 4, result.summary()
    # reference: laspy's point counts; every scan converted whatever happens to the grid
    assert result.points == sum(len(l.points) for l in (near_a, near_b, far, other))
    assert set(result.ungridded) == {"st-20160503T101500Z", "st-20160504T101500Z"}
    assert "away from station st's other scans" in result.ungridded["st-20160503T101500Z"]
    assert "CRS" in result.ungridded["st-20160504T101500Z"]
    assert "converted, not gridded" in result.summary()
    cube = xr.open_zarr(shelf / "grids/st.zarr", zarr_format=3)
    assert cube.sizes["time"] == 2 and cube.sizes["x"] * cube.sizes["y"] < 400 * 400 < MAX_CELLS


def test_grid_beyond_the_cell_limit_is_skipped_and_points_kept(tmp_path):
    from archive.sitefile import parse_site_file

    src, shelf = tmp_path / "src", tmp_path / "shelf"
    las = _las(src / "st/a_20160501_101500.las", scales=(0.001,) * 3, offsets=(500_000.0, 7_650_000.0, 0.0), gps=None)
    site = parse_site_file({"grids": {"cell": 0.01}})  # 60 m at 1 cm: 36 million cells
    result = migrate(str(src), str(shelf), site, previews=False)
    assert result.failed == [] and result.points == len(las.points), result.summary()  # reference: laspy count
    assert "beyond 16,777,216 cells" in result.ungridded["st-20160501T101500Z"]
    assert not (shelf / "grids/st.zarr").exists()


# --- 5. local frames --------------------------------------------------------------------------

def test_local_frame_items_have_null_geometry_and_find_by_bbox_in_the_frame(tmp_path):
    import json

    import pystac
    from stac_pydantic import Item

    src, shelf = tmp_path / "src", tmp_path / "shelf"
    common = dict(scales=(0.001,) * 3, offsets=(0.0, 0.0, 0.0), crs=None, gps=None, point_format=1, version="1.2")
    a = _las(src / "st/a_20160501_101500.las", **common, centre=(100.0, 100.0, 5.0), seed=1)
    _las(src / "st/b_20160502_101500.las", **common, centre=(400.0, 100.0, 5.0), seed=2)
    result = migrate(str(src), str(shelf), crs="none", previews=False)
    assert result.failed == [] and len(result.converted) == 2, result.summary()
    for path in (shelf / "scans/items").rglob("*.json"):
        item = json.loads(path.read_text())
        assert item["geometry"] is None and "bbox" not in item
        Item.model_validate(item)  # reference: stac-pydantic (STAC allows geometry null without bbox)
        pystac.Item.from_dict(item)  # reference: pystac round trip
        assert item["properties"]["proj:code"] is None and "ENGCRS" in item["properties"]["proj:wkt2"]
    found = archive.open_shelf(str(shelf)).find(bbox=(50, 50, 150, 150))
    assert [s.id for s in found] == ["st-20160501T101500Z"]
    got = found.read_points()
    # reference: laspy's coordinates of the file in that frame
    np.testing.assert_array_equal(np.sort(got["x"].to_numpy()), np.sort(np.asarray(a.x)))


# --- 6. failures are reported -----------------------------------------------------------------

def test_a_run_where_every_file_fails_prints_the_table_and_exits_1(tmp_path):
    from click.testing import CliRunner

    from archive.cli import cli

    src, shelf = tmp_path / "src", tmp_path / "shelf"
    for i in range(2):  # no CRS and no --crs: each file fails for its own reason
        _las(src / f"st/s{i}_2016050{i + 1}_101500.las", scales=(0.001,) * 3, offsets=(500_000.0, 7_650_000.0, 0.0), crs=None, seed=i)
    out = CliRunner().invoke(cli, ["migrate", str(src), str(shelf)])
    assert out.exit_code == 1, out.output
    assert "no scans to catalog" not in out.output
    assert "st/s0_20160501_101500.las: no CRS in the file" in out.output
    assert "st/s1_20160502_101500.las: no CRS in the file" in out.output


def test_serial_run_lets_programming_errors_through_and_data_errors_become_rows(tmp_path, monkeypatch):
    import importlib

    from archive.sources import SourceError

    m = importlib.import_module("archive.migrate")  # the module; `archive.migrate` is also the function

    src = tmp_path / "src"
    _las(src / "st/a_20160501_101500.las", scales=(0.001,) * 3, offsets=(500_000.0, 7_650_000.0, 0.0), gps=None)

    def bug(task):
        raise TypeError("a bug, not a bad file")

    monkeypatch.setattr(m, "_convert", bug)
    with pytest.raises(TypeError, match="a bug"):
        migrate(str(src), str(tmp_path / "shelf1"), previews=False)

    def bad(task):
        raise SourceError(f"{task.report.relpath}: points unreadable")

    monkeypatch.setattr(m, "_convert", bad)
    result = migrate(str(src), str(tmp_path / "shelf2"), previews=False)
    assert result.failed == [("st/a_20160501_101500.las", "points unreadable")]
    assert "cluster" not in result.summary()


def test_unknown_station_names_the_stations_and_renamed_stations_are_noted(tmp_path):
    src, shelf = tmp_path / "src", tmp_path / "shelf"
    _las(src / "north-east/a_20160501_101500.las", scales=(0.001,) * 3, offsets=(500_000.0, 7_650_000.0, 0.0), gps=None)
    result = migrate(str(src), str(shelf), previews=False)
    assert result.converted == ["north_east-20160501T101500Z"]
    assert any("station folder 'north-east' is named 'north_east'" in n for n in result.notes)
    survey = pq.read_table(shelf / "survey.parquet").to_pylist()[0]
    assert any("'north-east' is named 'north_east'" in n for n in survey["notes"])
    with pytest.raises(ValueError, match="no station 'north-east' on this shelf; its stations are north_east"):
        archive.open_shelf(str(shelf)).find(station="north-east")


def test_extract_to_las_gives_back_the_integers_of_an_odd_scale(tmp_path):
    src, shelf = tmp_path / "src", tmp_path / "shelf"
    las = _las(src / "st/scan_20160501_101500.las", scales=SCALES[0][0], offsets=SCALES[0][1], gps=1.146e9 - 1e9)
    migrate(str(src), str(shelf), previews=False)
    out = tmp_path / "out.las"
    extract(str(shelf), str(out), (500_000.0, 7_650_000.0, 500_200.0, 7_650_200.0))
    back = laspy.read(str(out))
    # reference: laspy reading both files; the extract keeps the source's scale, offset and integers
    assert tuple(back.header.scales) == SCALES[0][0] and tuple(back.header.offsets) == SCALES[0][1]
    for raw in ("X", "Y", "Z"):
        np.testing.assert_array_equal(np.sort(np.asarray(back.points[raw])), np.sort(np.asarray(las.points[raw])))


def test_week_time_file_names_its_gps_week(tmp_path):
    import json

    Time = _astropy()
    src, shelf = tmp_path / "src", tmp_path / "shelf"
    when = Time("2016-05-03T08:00:00", scale="utc")
    _las(src / "st/2016-05-03/scan.las", scales=(0.001,) * 3, offsets=(500_000.0, 7_650_000.0, 0.0), point_format=1,
         version="1.2", week_seconds=when.gps % (7 * 86400), created=None)
    migrate(str(src), str(shelf), crs=CRS, previews=False)
    meta = json.loads(pq.read_schema(next((shelf / "points").rglob("*.parquet"))).metadata[b"scanshelf"])
    # reference: astropy's GPS seconds // one week = GPS week 1895 (2016-05-01 .. 2016-05-07)
    assert meta["gps_time"].startswith(f"GPS week seconds of GPS week {int(when.gps // (7 * 86400))} ")
    assert int(when.gps // (7 * 86400)) == 1895
