"""The demo archive holds what its answer key says, checked with libraries we did not write."""

from __future__ import annotations

import csv
import math
import tomllib
from datetime import datetime, timezone
from pathlib import Path

import laspy
import numpy as np
import pytest
import rioxarray
import xarray as xr
from click.testing import CliRunner
from scipy.spatial import cKDTree

from archive.cli.demo import demo
from archive.demo import DemoTruth, make_demo, scanner, site
from archive.demo.make import plan_scans, START, SWITCH

ROOT = Path(__file__).resolve().parents[1]
SMALL = dict(points_per_scan=5_000, weeks=1)
GPS_EPOCH = datetime(1980, 1, 6, tzinfo=timezone.utc)  # start of GPS time (from memory)


@pytest.fixture(scope="module")
def built(tmp_path_factory):
    dest = tmp_path_factory.mktemp("demo")
    truth = make_demo(dest, **SMALL)
    return dest, truth


def _utc(text: str) -> datetime:
    return datetime.strptime(text, "%Y-%m-%dT%H:%M:%SZ").replace(tzinfo=timezone.utc)


def _gps_seconds(text: str) -> float:
    # GPS - UTC = 18 s since 2017 (from memory); the truth file records the value it used
    return (_utc(text) - GPS_EPOCH).total_seconds() + 18.0


def _files(root: Path) -> dict[str, bytes]:
    return {p.relative_to(root).as_posix(): p.read_bytes() for p in sorted(root.rglob("*")) if p.is_file()}


def test_same_seed_gives_byte_identical_files(tmp_path):
    tiny = dict(points_per_scan=600, weeks=1)
    make_demo(tmp_path / "a", workers=2, **tiny)
    make_demo(tmp_path / "b", workers=1, **tiny)  # serial this time: parallelism must not matter
    first, second = _files(tmp_path / "a"), _files(tmp_path / "b")
    assert sorted(first) == sorted(second) and len(first) > 40
    assert [name for name in first if first[name] != second[name]] == []
    other = make_demo(tmp_path / "c", seed=7, **tiny)
    assert not {f.sha256 for f in other.point_files} & {f.sha256 for f in DemoTruth.load(
        tmp_path / "a" / "demo-truth.json").point_files}


def test_truth_reads_back_and_describes_every_file(built):
    dest, truth = built
    assert DemoTruth.load(dest / "demo-truth.json") == truth
    described = {f.path for f in truth.point_files} | {g.path for g in truth.grid_files}
    described |= {s for g in truth.grid_files for s in g.sidecars} | {o.path for o in truth.other_files}
    on_disk = {p.relative_to(dest / "source").as_posix() for p in (dest / "source").rglob("*") if p.is_file()}
    assert on_disk == described
    assert not (dest / "source" / "demo-truth.json").exists()
    # 4 summer days at 6 h + 3 winter days, two stations, plus the duplicate
    assert truth.totals["scans"] == 2 * (4 * 4 + 3)
    assert truth.totals["point_files"] == truth.totals["scans"] + 1
    assert {f.station for f in truth.point_files} == {"north", "south"}
    for f in truth.point_files:
        assert f.path.split("/")[0] == f.station  # the first folder is the station id


def test_schedule_is_six_hourly_then_daily(built):
    _, truth = built
    times = sorted(_utc(f.scan_time) for f in truth.point_files if f.station == "north" and not f.fault
                   or f.station == "north" and f.fault.kind != "duplicate")
    gaps = np.diff([t.timestamp() for t in times]) / 3600.0
    before = [g for t, g in zip(times, gaps) if t < SWITCH]
    after = [g for t, g in zip(times, gaps) if t >= SWITCH]
    assert all(5.9 < g < 6.1 for g in before[:-1])
    assert all(23.9 < g < 24.1 for g in after)


def test_laspy_reads_every_good_las_and_laz(built):
    dest, truth = built
    good = [f for f in truth.point_files if f.format in ("las", "laz") and f.fault is None]
    assert {(f.las_version, f.point_format, f.compressed) for f in good} == {
        ("1.4", 6, False), ("1.4", 7, True), ("1.2", 1, False), ("1.2", 3, True)}
    for f in good:
        las = laspy.read(dest / "source" / f.path)  # reference: laspy
        h = las.header
        assert f"{h.version.major}.{h.version.minor}" == f.las_version
        assert h.point_format.id == f.point_format
        assert h.point_count == len(las.points) == f.point_count == f.recoverable_points
        assert h.parse_crs().to_epsg() == 32633  # reference: laspy + pyproj
        np.testing.assert_allclose(h.mins, f.bbox[:3], atol=1e-3)
        np.testing.assert_allclose(h.maxs, f.bbox[3:], atol=1e-3)
        np.testing.assert_array_equal(h.scales, f.scale)
        first = float(np.min(las.gps_time))
        if f.las_version == "1.4":
            # global encoding bit 0: adjusted standard GPS time = GPS seconds - 1e9 (ASPRS LAS 1.4)
            assert h.global_encoding.value & 1 == 1
            assert first + 1e9 == _gps_seconds(f.scan_time)
            assert {"reflectance", "deviation"} <= set(las.point_format.extra_dimension_names)
            assert las["reflectance"].dtype == np.float32
        else:
            assert h.global_encoding.value & 1 == 0  # GPS week seconds (ASPRS LAS 1.2)
            stamp = datetime.strptime(Path(f.path).stem.split("_", 1)[1], "%Y%m%d_%H%M%S").replace(tzinfo=timezone.utc)
            assert _utc(f.scan_time) == stamp
            assert math.isclose(first, _gps_seconds(f.scan_time) % 604_800, abs_tol=1e-6)
        if f.point_format in (3, 7):
            assert int(np.max(las.red)) > 0
        assert set(np.unique(las.classification)) <= {1, 2, 3, 7, 9}
        assert np.all(np.asarray(las.return_number) <= np.asarray(las.number_of_returns))


def test_truncated_file_is_shorter_than_its_header_says(built):
    dest, truth = built
    (f,) = truth.faults("truncated")
    path = dest / "source" / f.path
    with laspy.open(path) as reader:  # reference: laspy header parsing
        h = reader.header
        record = h.point_format.size
        assert h.point_count == f.header_point_count == f.point_count
        stored = path.stat().st_size - h.offset_to_point_data
        assert stored < h.point_count * record
        assert stored // record == f.recoverable_points
        assert stored % record != 0  # cut inside a record
        points = reader.read_points(f.recoverable_points)
    assert len(points) == f.recoverable_points
    assert np.all(np.diff(points.gps_time) >= 0)


def test_count_mismatch_claims_more_points_than_stored(built):
    dest, truth = built
    (f,) = truth.faults("count_mismatch")
    path = dest / "source" / f.path
    with laspy.open(path) as reader:
        h = reader.header
        assert h.point_count == f.header_point_count > f.recoverable_points
        stored = path.stat().st_size - h.offset_to_point_data
        assert stored == f.recoverable_points * h.point_format.size  # whole records only
        assert len(reader.read_points(f.recoverable_points)) == f.recoverable_points


def test_duplicate_and_missing_crs(built):
    dest, truth = built
    (dup,) = truth.faults("duplicate")
    original = dup.fault.details["duplicate_of"]
    assert (dest / "source" / dup.path).read_bytes() == (dest / "source" / original).read_bytes()
    assert dup.scan_id == truth.file(original).scan_id and dup.path != original
    (bare,) = truth.faults("no_crs")
    las = laspy.read(dest / "source" / bare.path)
    assert las.header.parse_crs() is None and bare.crs is None and "crs" in bare.needs_site_file
    assert len(las.points) == bare.recoverable_points


def test_ascii_exports_and_bad_rows(built):
    dest, truth = built
    ascii_files = [f for f in truth.point_files if f.format == "ascii"]
    assert {Path(f.path).suffix for f in ascii_files} == {".csv", ".txt"}
    for f in ascii_files:
        text = (dest / "source" / f.path).read_text()
        lines = text.splitlines()
        delimiter = "," if f.path.endswith(".csv") else " "
        assert lines[0].split(delimiter) == list(f.columns)
        good, nan_rows, malformed = 0, [], []
        for i, row in enumerate(csv.reader(lines[1:], delimiter=delimiter)):  # reference: Python csv
            try:
                values = [float(v) for v in row]
            except ValueError:
                malformed.append(i)
                continue
            if len(values) != 5:
                malformed.append(i)
            elif not all(map(math.isfinite, values)):
                nan_rows.append(i)
            else:
                good += 1
                assert len(row[0].split(".")[1]) == 3  # three decimals for coordinates
        assert good == f.recoverable_points
        if f.fault:
            assert nan_rows == f.fault.details["nan_rows"] and malformed == f.fault.details["malformed_rows"]
            assert nan_rows and malformed
        else:
            assert nan_rows == malformed == [] and good == f.point_count
        assert "crs" in f.needs_site_file


def _angles(las, origin):
    dx, dy, dz = las.x - origin[0], las.y - origin[1], las.z - origin[2]
    horizontal = np.hypot(dx, dy)
    azimuth = np.degrees(np.arctan2(dx, dy)) % 360.0
    return azimuth, np.degrees(np.arctan2(dz, horizontal)), np.sqrt(horizontal**2 + dz**2)


def test_points_come_in_sweep_order_and_thin_out_with_range(built):
    dest, truth = built
    station = next(s for s in truth.stations if s.id == "north")
    f = next(f for f in truth.point_files if f.station == "north" and f.format == "las" and f.fault is None)
    las = laspy.read(dest / "source" / f.path)
    assert np.all(np.diff(las.gps_time) >= 0)
    azimuth, elevation, distance = _angles(las, station.origin)
    apart = distance > 50  # millimetre coordinates blur the angles of the closest points
    azimuth, elevation, distance = azimuth[apart], elevation[apart], distance[apart]
    xyz = np.column_stack([las.x, las.y, las.z])[apart]
    assert np.all(np.diff(azimuth) > -1e-3)  # columns turn clockwise
    same_column = np.abs(np.diff(azimuth)) < 1e-3
    assert same_column.mean() > 0.9
    assert np.all(np.diff(elevation)[same_column] > -1e-3)  # the mirror sweeps upwards in a column
    assert station.elevation[0] - 0.01 <= elevation.min() and elevation.max() <= station.elevation[1] + 0.01
    # spacing to the nearest neighbour grows with range; reference: scipy.spatial.cKDTree
    spacing = cKDTree(xyz).query(xyz, k=2)[0][:, 1]
    near = np.median(spacing[(distance > 200) & (distance < 500)])
    far = np.median(spacing[(distance > 900) & (distance < 1600)])
    assert far > 2 * near
    scan_seconds = float(las.gps_time.max() - las.gps_time.min())
    assert 0.9 * station.scan_duration_s < scan_seconds <= station.scan_duration_s


def test_front_bobs_with_the_tide(built):
    dest, truth = built
    tide = truth.site["tide"]
    high = datetime.fromisoformat(tide["high_water"])
    means, times, front_u = [], [], []
    for f in truth.point_files:
        if f.station != "north" or f.las_version != "1.4" or f.fault is not None:
            continue
        las = laspy.read(dest / "source" / f.path)
        u, v = site.to_local(np.asarray(las.x), np.asarray(las.y))
        front = (las.classification == 1) & (u > -90) & (u < -25) & (np.abs(v) < 300)
        assert front.sum() > 30
        means.append(float(np.mean(np.asarray(las.z)[front])))
        front_u.append(float(np.mean(u[front])))
        times.append(_utc(f.scan_time))
    days = np.array([(t - START).total_seconds() / 86400 for t in times])
    hours = np.array([(t - high).total_seconds() / 3600 for t in times])
    # an M2 tide of the recorded amplitude and 12.42 h period (common values of the trade)
    expected = tide["amplitude_m"] * np.cos(2 * np.pi * hours / tide["period_hours"])
    # fit level + thinning trend + tide together (the 6 h sampling aliases the tide into a drift)
    design = np.column_stack([np.ones_like(days), days, expected])
    coef, *_ = np.linalg.lstsq(design, np.array(means), rcond=None)  # reference: numpy least squares
    flexure = np.exp(np.mean(front_u) / tide["flexure_length_m"])
    assert coef[2] == pytest.approx(flexure, abs=0.1)  # the front rises and falls with the sea
    assert coef[1] == pytest.approx(-truth.site["thinning_m_per_day"], abs=0.05)
    detided = np.array(means) - design[:, :2] @ coef[:2]
    assert np.corrcoef(detided, expected)[0, 1] > 0.95
    assert np.std(detided - coef[2] * expected) < 0.15
    # open water sits at the modelled sea level
    f = next(f for f in truth.point_files if f.station == "north" and f.las_version == "1.4" and f.fault is None)
    las = laspy.read(dest / "source" / f.path)
    water = np.asarray(las.z)[las.classification == 9]
    assert abs(np.median(water) - f.tide_m) < 0.05


def test_thinning_shows_between_first_and_last_dem(built):
    dest, truth = built
    tif = next(g for g in truth.grid_files if g.format == "geotiff" and g.product == "dem")
    nc = next(g for g in truth.grid_files if g.format == "netcdf" and g.product == "dem")
    first = rioxarray.open_rasterio(dest / "source" / tif.path, masked=True).squeeze()  # reference: rioxarray
    last = xr.open_dataset(dest / "source" / nc.path, engine="h5netcdf", decode_coords="all")["elevation"]
    u, v = site.to_local(*np.meshgrid(first.x.values, first.y.values))
    upglacier = (u < -600) & (np.abs(v) < 200)  # away from the tide
    change = (last.values - first.values)[upglacier]
    days = (_utc(nc.time) - _utc(tif.time)).total_seconds() / 86400
    assert np.nanmean(change) == pytest.approx(-site.THINNING * days, abs=0.1)


def test_grid_files_open_with_xarray_and_rioxarray(built):
    dest, truth = built
    assert {g.format for g in truth.grid_files} == {"geotiff", "netcdf", "aaigrid"}
    assert {g.crs for g in truth.grid_files} == {"EPSG:32633", "EPSG:32632", None}
    for g in truth.grid_files:
        path = dest / "source" / g.path
        if g.format == "netcdf":
            ds = xr.open_dataset(path, engine="h5netcdf", decode_coords="all")  # reference: xarray
            assert list(ds.data_vars) == list(g.variables)
            arr = ds[g.variables[0]]
            assert arr.attrs["units"] == g.units[g.variables[0]]
            values = np.stack([ds[name].values for name in g.variables])  # fill values decode to NaN
        else:
            arr = rioxarray.open_rasterio(path, masked=True)  # reference: rioxarray
            assert arr.shape[0] == len(g.variables)
            assert arr.rio.encoded_nodata == g.nodata
            values = arr.values
        assert arr.shape[-2:] == tuple(g.shape)
        assert tuple(arr.rio.transform())[:6] == pytest.approx(g.transform)
        crs = arr.rio.crs
        assert (crs.to_epsg() if crs else None) == (int(g.crs.split(":")[1]) if g.crs else None)
        if g.product == "displacement":
            assert 3.0 < np.nanmax(np.hypot(values[0], values[1])) <= 1.01 * site.FLOW_AT_FRONT
    (bare,) = [g for g in truth.grid_files if g.crs is None]
    assert bare.needs_site_file == ("crs",) and bare.intended_crs == site.SITE_CRS


def test_site_file_follows_the_example_schema(built):
    dest, truth = built
    example = tomllib.loads((ROOT / "examples" / "site.toml").read_text())
    site_file = tomllib.loads((dest / truth.site_file).read_text())
    assert set(site_file) <= set(example)
    for section in ("site", "paths", "ascii", "attributes", "grids", "catalog"):
        assert set(site_file[section]) <= set(example[section]), section
    assert site_file["site"]["crs"] == site.SITE_CRS
    assert set(site_file["stations"]) == {s.id for s in truth.stations}
    assert all(set(s) <= {"id", "origin"} for s in site_file["stations"].values())
    zero_config = [f for f in truth.point_files if not f.needs_site_file]
    assert len(zero_config) > len(truth.point_files) / 2  # most files need no site file


def test_total_points_scales_and_chunks_stay_bounded(monkeypatch):
    plans = plan_scans(1, 2, 4, 20_000, 3_000_000_007, False, START, SWITCH)
    assert sum(p.n_points for p in plans) == 3_000_000_007
    monkeypatch.setattr(scanner, "CHUNK_BEAMS", 1_000)
    station = scanner.STATIONS[0]
    sizes = [c["x"].size for c in scanner.sweep(station, START.timestamp(), 12_345, (1, 2, 3))]
    assert sum(sizes) == 12_345 and len(sizes) > 5
    assert max(sizes) <= 2 * 1_000


def test_cli_writes_and_reports(tmp_path):
    runner = CliRunner()
    result = runner.invoke(demo, [str(tmp_path / "d"), "--points", "300", "--weeks", "1", "--stations", "1",
                                  "--no-faults"])
    assert result.exit_code == 0, result.output
    assert "wrote 19 point files" in result.output
    truth = DemoTruth.load(tmp_path / "d" / "demo-truth.json")
    assert all(f.fault is None for f in truth.point_files) and truth.totals["points"] == 19 * 300
    again = runner.invoke(demo, [str(tmp_path / "d"), "--points", "300", "--weeks", "1", "--stations", "1"])
    assert again.exit_code != 0 and "--overwrite" in str(again.exception)
