"""Zarr v3 elevation cubes: layout, appends, replacement, series copy; read back by other tools."""

from __future__ import annotations

import json
import os
from datetime import datetime, timedelta, timezone
from pathlib import Path

import numcodecs
import numpy as np
import pytest
import xarray as xr
import zarr
from pyproj import CRS

from archive.grids import GridSpec, bin_points, open_cube, read_spec, write_epoch, write_series

EPSG = "EPSG:32633"
T0 = datetime(2026, 3, 1, 6, 0, tzinfo=timezone.utc)


def spec_() -> GridSpec:
    return GridSpec.from_bounds("north", (500000.0, 7650000.0, 500290.0, 7650190.0), cell=1.0, margin=5.0,
                                crs_wkt=CRS.from_user_input(EPSG).to_wkt())


def epoch(spec: GridSpec, level: float, seed: int):
    rng = np.random.default_rng(seed)
    n = 40_000
    x = rng.uniform(spec.x0, spec.x1, n)
    y = rng.uniform(spec.y0, spec.y1, n)
    return bin_points(spec, x, y, level + 0.01 * (x - spec.x0) + rng.normal(0, 0.02, n))


def quantized(values: np.ndarray) -> np.ndarray:
    """What the store keeps of float32 values. # reference: numcodecs.Quantize(digits=3) itself"""
    q = numcodecs.Quantize(digits=3, dtype="<f4")
    return q.decode(q.encode(np.asarray(values, "<f4")))


def sid(i: int) -> str:
    return f"north-{T0 + timedelta(days=i):%Y%m%dT%H%M%SZ}"


@pytest.fixture()
def cube(tmp_path: Path):
    spec = spec_()
    url = str(tmp_path / "grids" / "north.zarr")
    for i in (0, 1):
        write_epoch(url, spec, T0 + timedelta(days=i), sid(i), epoch(spec, 100.0 + i, i))
    return url, spec


def test_store_opens_with_plain_xarray_and_zarr_and_crs_round_trips(cube):
    url, spec = cube
    # reference: xarray.open_zarr and zarr.open_group, no scanshelf code
    ds = xr.open_zarr(url, zarr_format=3, consolidated=True)
    assert dict(ds.sizes) == {"time": 2, "y": spec.ny, "x": spec.nx}
    assert ds["elevation"].dtype == np.float32 and ds["point_count"].dtype == np.uint32
    assert ds["elevation"].attrs["units"] == "m" and ds["elevation"].attrs["standard_name"] == "surface_altitude"
    assert ds["elevation"].attrs["grid_mapping"] == "spatial_ref"
    assert ds["x"].attrs["standard_name"] == "projection_x_coordinate"
    np.testing.assert_allclose(ds["x"].values, spec.x)
    np.testing.assert_allclose(ds["y"].values, spec.y)
    assert str(ds["time"].values[0]) == "2026-03-01T06:00:00.000000000"
    # reference: pyproj CRS equality after a WKT round trip through the store
    assert CRS.from_wkt(ds["spatial_ref"].attrs["crs_wkt"]) == CRS.from_user_input(EPSG)
    group = zarr.open_group(url, mode="r")
    meta = group["elevation"].metadata.to_dict()
    assert meta["codecs"][0]["name"] == "sharding_indexed"  # reference: Zarr v3 sharding codec name
    assert meta["codecs"][0]["configuration"]["chunk_shape"] == (1, min(256, spec.ny), min(256, spec.nx))
    root_meta = json.loads(Path(url, "zarr.json").read_text())
    assert root_meta["consolidated_metadata"]["metadata"]["elevation"]["zarr_format"] == 3
    assert read_spec(url) == spec


def test_append_adds_objects_without_rewriting_earlier_chunks(cube):
    url, spec = cube
    before = {p: p.stat().st_mtime_ns for p in Path(url, "elevation", "c").rglob("*") if p.is_file()}
    assert len(before) == 2  # one shard object per epoch
    write_epoch(url, spec, T0 + timedelta(days=5), sid(5), epoch(spec, 105.0, 5))
    after = {p: p.stat().st_mtime_ns for p in Path(url, "elevation", "c").rglob("*") if p.is_file()}
    assert {p: after[p] for p in before} == before
    assert len(after) == 3
    assert open_cube(url).sizes["time"] == 3


def test_out_of_order_append_is_read_sorted_and_rewrite_replaces(cube):
    url, spec = cube
    write_epoch(url, spec, T0 - timedelta(days=3), sid(-3), epoch(spec, 97.0, 9))  # an older scan arrives late
    ds = open_cube(url)
    assert list(ds["scan_id"].values) == [sid(-3), sid(0), sid(1)]
    assert np.all(np.diff(ds["time"].values) > np.timedelta64(0))
    again = epoch(spec, 150.0, 11)
    index = write_epoch(url, spec, T0 + timedelta(days=1), sid(1), again)
    assert index == 1  # storage slot of sid(1)
    ds = open_cube(url)
    assert ds.sizes["time"] == 3
    np.testing.assert_array_equal(ds["elevation"].sel(time=ds.time[-1]).values, quantized(again.elevation))


def test_other_grid_is_refused(cube):
    url, spec = cube
    other = GridSpec(spec.station, spec.crs_wkt, spec.x0, spec.y0, 2.0, spec.nx // 2, spec.ny // 2)
    with pytest.raises(ValueError, match="different grid"):
        write_epoch(url, other, T0 + timedelta(days=9), sid(9), epoch(other, 1.0, 1))


def test_series_copy_equals_the_map_layout_and_goes_stale(cube):
    url, spec = cube
    write_series(url)
    series = open_cube(url, layout="series")
    maps = open_cube(url)
    # reference: zarr-python decodes our hand-written shards (interior and partial edge shards)
    raw = zarr.open_group(url, mode="r")
    for window in (np.s_[:, 30:50, 10:40], np.s_[:, -20:, -20:]):
        for name in ("elevation", "point_count"):
            np.testing.assert_array_equal(raw[f"series/{name}"][window], maps[name].values[window])
    np.testing.assert_array_equal(series["elevation"][:, 40, 17].values, maps["elevation"][:, 40, 17].values)
    meta = zarr.open_group(url, mode="r")["series/elevation"].metadata.to_dict()
    assert meta["chunk_grid"]["configuration"]["chunk_shape"][0] == 2  # a shard holds every epoch
    assert meta["codecs"][0]["configuration"]["chunk_shape"][0] == 2  # so does each inner chunk
    write_epoch(url, spec, T0 + timedelta(days=1), sid(1), epoch(spec, 90.0, 3))  # same scans, new values
    with pytest.raises(ValueError, match="stale"):
        open_cube(url, layout="series")
    write_series(url)
    np.testing.assert_array_equal(open_cube(url, layout="series")["elevation"][1, 5, 5].values,
                                  open_cube(url)["elevation"][1, 5, 5].values)
    write_epoch(url, spec, T0 + timedelta(days=7), sid(7), epoch(spec, 107.0, 7))
    with pytest.raises(ValueError, match="stale"):
        open_cube(url, layout="series")


def test_series_flag_is_set_once_and_read_from_the_series_group_itself(cube):
    from archive.grids.cube import SERIES_COMPLETE

    url, spec = cube
    own, root = Path(url, "series", "zarr.json"), Path(url, "zarr.json")
    write_series(url)
    write_epoch(url, spec, T0 + timedelta(days=2), sid(2), epoch(spec, 102.0, 2))
    # reference: the Zarr v3 JSON of the series group and the root's consolidated copy, read as plain JSON
    assert json.loads(own.read_text())["attributes"][SERIES_COMPLETE] is False
    stamp = own.stat().st_mtime_ns
    write_epoch(url, spec, T0 + timedelta(days=3), sid(3), epoch(spec, 103.0, 3))
    assert own.stat().st_mtime_ns == stamp  # flagged already: not rewritten
    assert json.loads(root.read_text())["consolidated_metadata"]["metadata"]["series"]["attributes"][SERIES_COMPLETE] is False
    # a rebuild killed after flagging its group complete, before consolidating: the root's copy
    # still says stale, the group says complete; the next append must flag the group itself
    write_series(url)
    meta = json.loads(root.read_text())
    meta["consolidated_metadata"]["metadata"]["series"]["attributes"][SERIES_COMPLETE] = False
    root.write_text(json.dumps(meta))
    write_epoch(url, spec, T0 + timedelta(days=4), sid(4), epoch(spec, 104.0, 4))
    assert json.loads(own.read_text())["attributes"][SERIES_COMPLETE] is False
    with pytest.raises(ValueError, match="stale"):
        open_cube(url, layout="series")


def test_naive_time_is_refused(tmp_path):
    spec = spec_()
    with pytest.raises(ValueError, match="timezone-aware"):
        write_epoch(str(tmp_path / "c.zarr"), spec, datetime(2026, 1, 1), "north-20260101T000000Z", epoch(spec, 1.0, 1))
    assert not os.path.exists(tmp_path / "c.zarr")


def test_cube_through_an_fsspec_url():
    """The same code over fsspec's in-memory filesystem (stands in for object storage)."""
    import fsspec

    spec = spec_()
    url = "memory://scanshelf-test-cube/grids/north.zarr"
    try:
        for i in (1, 0):
            write_epoch(url, spec, T0 + timedelta(days=i), sid(i), epoch(spec, 100.0 + i, i))
        write_series(url)
        ds = open_cube(url)
        assert list(ds["scan_id"].values) == [sid(0), sid(1)]
        assert read_spec(url) == spec
        np.testing.assert_array_equal(open_cube(url, layout="series")["point_count"][:, 9, 9].values,
                                      ds["point_count"][:, 9, 9].values)
    finally:
        fsspec.filesystem("memory").rm("/scanshelf-test-cube", recursive=True)


def test_elevations_go_through_a_stated_quantize_filter(cube):
    url, spec = cube
    # reference: the Zarr v3 array metadata as JSON, read without zarr-python
    meta = json.loads(Path(url, "elevation", "zarr.json").read_text())
    inner = meta["codecs"][0]["configuration"]["codecs"]
    assert inner[0] == {"name": "numcodecs.quantize", "configuration": {"digits": 3, "dtype": "<f4"}}
    assert meta["data_type"] == "float32" and "Quantize(digits=3)" in meta["attributes"]["scanshelf:quantize"]
    counts = json.loads(Path(url, "point_count", "zarr.json").read_text())["codecs"][0]["configuration"]["codecs"]
    assert [c["name"] for c in counts] == ["bytes", "zstd"]  # integers stay exact
    stored = zarr.open_group(url, mode="r")["elevation"][0]
    np.testing.assert_array_equal(stored, quantized(epoch(spec, 100.0, 0).elevation))


def test_empty_chunks_are_not_stored(tmp_path):
    spec = GridSpec.from_bounds("north", (500000.0, 7650000.0, 500600.0, 7650600.0), cell=1.0, margin=0.0,
                                crs_wkt=CRS.from_user_input(EPSG).to_wkt())
    url = str(tmp_path / "c.zarr")
    rng = np.random.default_rng(4)
    x, y = rng.uniform(spec.x0, spec.x0 + 50, 5000), rng.uniform(spec.y0, spec.y0 + 50, 5000)  # one corner
    write_epoch(url, spec, T0, sid(0), bin_points(spec, x, y, 100 + 0.01 * x))
    write_epoch(url, spec, T0 + timedelta(days=1), sid(1), bin_points(spec, x[:0], y[:0], x[:0]))  # no points
    shards = sorted(p.relative_to(url).as_posix() for p in Path(url, "elevation", "c").rglob("*") if p.is_file())
    assert shards == ["elevation/c/0/0/0"]  # the empty epoch wrote no object
    # reference: the sharding spec's index (16 B per inner chunk, then a CRC32C) at the shard's end
    raw = Path(url, "elevation", "c", "0", "0", "0").read_bytes()
    index = np.frombuffer(raw[-(16 * 9) - 4:-4], "<u8").reshape(-1, 2)
    assert (index[:, 0] != 2**64 - 1).sum() == 1  # of 3 x 3 inner chunks, only the corner's is stored
    write_series(url)
    series = {p.relative_to(url).as_posix() for p in Path(url, "series", "elevation", "c").rglob("*") if p.is_file()}
    # reference: the shard edge from the array's JSON metadata; the corner's rows and columns
    edge = json.loads(Path(url, "series", "elevation", "zarr.json").read_text())["chunk_grid"]["configuration"]["chunk_shape"][1]
    rows = {r // edge for r in range(spec.ny) if spec.y[r] < spec.y0 + 50}
    cols = {c // edge for c in range(spec.nx) if spec.x[c] < spec.x0 + 50}
    assert series == {f"series/elevation/c/0/{r}/{c}" for r in rows for c in cols}  # only shards with data
    ds = xr.open_zarr(url, group="series", zarr_format=3, consolidated=True)
    assert np.isnan(ds["elevation"][:, 300, 300].values).all() and int(ds["point_count"][:, 300, 300].sum()) == 0


def test_appended_steps_read_back_with_plain_xarray_and_consolidated_json(cube):
    url, spec = cube
    late = epoch(spec, 102.0, 2)
    late.outside = 17
    write_epoch(url, spec, T0 + timedelta(days=2, microseconds=600_000), sid(2), late)
    # reference: xarray.open_zarr decodes the CF time from the stored integers and its units
    ds = xr.open_zarr(url, zarr_format=3, consolidated=True)
    assert [str(t) for t in ds["time"].values] == [f"2026-03-0{d}T06:00:00.000000000" for d in (1, 2, 3)]
    assert list(ds["scan_id"].values) == [sid(0), sid(1), sid(2)]
    assert ds["points_outside"].values.tolist() == [0, 0, 17] and ds["points_outside"].dtype == np.uint64
    np.testing.assert_array_equal(ds["elevation"][2].values, quantized(late.elevation))
    np.testing.assert_array_equal(ds["point_count"][2].values, late.point_count)
    # reference: the consolidated copy in the root's Zarr v3 JSON, read without zarr-python
    meta = json.loads(Path(url, "zarr.json").read_text())["consolidated_metadata"]["metadata"]
    assert {name: meta[name]["shape"][0] for name in ("elevation", "time", "scan_id", "points_outside")} == {
        "elevation": 3, "time": 3, "scan_id": 3, "points_outside": 3}


def test_a_blanked_slot_takes_the_new_scans_time_and_values(cube):
    url, spec = cube
    group = zarr.open_group(url, mode="r+")
    group["scan_id"][0] = ""  # a retired scan's slot (migrate blanks it this way)
    new = epoch(spec, 130.0, 8)
    assert write_epoch(url, spec, T0 + timedelta(days=40), sid(40), new) == 0
    # reference: xarray.open_zarr, no scanshelf code
    ds = xr.open_zarr(url, zarr_format=3, consolidated=True)
    assert ds.sizes["time"] == 2
    assert list(ds["scan_id"].values) == [sid(40), sid(1)]
    assert str(ds["time"].values[0]) == "2026-04-10T06:00:00.000000000"
    np.testing.assert_array_equal(ds["elevation"][0].values, quantized(new.elevation))


def _files(root: Path) -> dict[str, bytes]:
    return {p.relative_to(root).as_posix(): p.read_bytes() for p in sorted(root.rglob("*")) if p.is_file()}


@pytest.mark.parametrize("case", ["crs", "no-crs", "several-shards"])
def test_new_cube_is_byte_identical_to_xarrays_to_zarr(tmp_path, case):
    """The first step goes through zarr alone (no xarray in migrate); the store is what xarray wrote."""
    from archive.grids.cube import epoch_dataset, map_encoding

    wkt = "" if case == "no-crs" else CRS.from_user_input(EPSG).to_wkt()
    w, h = (2100.0, 2100.0) if case == "several-shards" else (290.0, 190.0)  # 2110² float32 cells > 16 MB
    spec = GridSpec.from_bounds("north", (500000.0, 7650000.0, 500000.0 + w, 7650000.0 + h), cell=1.0,
                                margin=5.0, crs_wkt=wkt)
    grid = epoch(spec, 100.0, 3)
    grid.outside = 0 if case == "crs" else 17  # points_outside: no chunk at the fill value, one otherwise
    url = tmp_path / "ours.zarr"
    write_epoch(str(url), spec, T0 + timedelta(microseconds=250_000), sid(0), grid)
    # reference: xarray's own CF encoder and Zarr writer, given the cube's dataset and encoding
    epoch_dataset(spec, T0 + timedelta(microseconds=250_000), sid(0), grid).to_zarr(
        str(tmp_path / "xarray.zarr"), zarr_format=3, consolidated=True, mode="w-", encoding=map_encoding(spec),
        write_empty_chunks=False)
    ours, theirs = _files(url), _files(tmp_path / "xarray.zarr")
    assert sorted(ours) == sorted(theirs)
    assert [name for name in ours if ours[name] != theirs[name]] == []
    if case == "several-shards":
        assert {n for n in ours if n.startswith("elevation/c/")} == {"elevation/c/0/0/0", "elevation/c/0/1/0"}
    ds = xr.open_zarr(str(url), zarr_format=3, consolidated=True)
    assert str(ds["time"].values[0]) == "2026-03-01T06:00:00.000000000"
    assert int(ds["points_outside"].values[0]) == grid.outside
    np.testing.assert_array_equal(ds["elevation"].values[0], quantized(grid.elevation))


def test_cube_steps_read_what_xarray_reads_sorted_without_blank_slots(cube):
    """The page's maps come through zarr alone (cube_steps): same steps, order and values."""
    from archive.grids.cube import cube_steps

    url, spec = cube
    write_epoch(url, spec, T0 - timedelta(days=3), sid(-3), epoch(spec, 97.0, 9))  # arrives late: slot 2
    write_epoch(url, spec, T0 + timedelta(days=5), sid(5), epoch(spec, 105.0, 5))
    zarr.open_group(url, mode="r+")["scan_id"][1] = ""  # a retired scan's slot
    steps = cube_steps(url)
    # reference: xarray.open_zarr (CF time decoding), blank ids dropped, then sorted by time
    ds = xr.open_zarr(url, zarr_format=3, consolidated=True)
    ds = ds.isel(time=np.flatnonzero(ds["scan_id"].values != "")).sortby("time")
    assert steps.scan_ids == [sid(-3), sid(0), sid(5)] == list(ds["scan_id"].values)
    np.testing.assert_array_equal(steps.times, ds["time"].values)
    for k in range(3):
        np.testing.assert_array_equal(steps.read("elevation", k), ds["elevation"][k].values)
        np.testing.assert_array_equal(steps.read("point_count", k), ds["point_count"][k].values)


@pytest.mark.parametrize("case", ["one-shard", "several-shards"])
def test_appended_and_replaced_steps_are_byte_identical_to_zarrs_own_writer(tmp_path, case):
    """Steps after the first write their map shards without zarr's array writer; the store must
    be what zarr-python's sharding writer stores for the same appends, object for object."""
    from archive.grids.cube import epoch_dataset, map_encoding

    w = 2100.0 if case == "several-shards" else 290.0  # 2010 x 2110 float32 cells > 16 MB: 2 shards of 8 x 5 chunks
    spec = GridSpec.from_bounds("north", (500000.0, 7650000.0, 500000.0 + w, 7650000.0 + 190.0 + (w - 290.0)),
                                cell=1.0, margin=5.0, crs_wkt=CRS.from_user_input(EPSG).to_wkt())
    rng = np.random.default_rng(11)
    x, y = rng.uniform(spec.x0, spec.x0 + 300, 20_000), rng.uniform(spec.y0, spec.y0 + 300, 20_000)
    steps = [(0, epoch(spec, 100.0, 0)), (1, bin_points(spec, x, y, 90 + 0.01 * y)),  # one corner only
             (2, bin_points(spec, x[:0], y[:0], x[:0])),  # no points: no map objects at all
             (1, epoch(spec, 101.0, 5))]  # the same scan again: replaced in place
    steps[1][1].outside = 9
    ours = tmp_path / "ours.zarr"
    for day, grid in steps:
        write_epoch(str(ours), spec, T0 + timedelta(days=day), sid(day), grid)
    # reference: xarray's to_zarr for the first step, then zarr-python's own array writer (its
    # sharding codec) for each later step: resize along time, assign the step, consolidate
    theirs = tmp_path / "theirs.zarr"
    epoch_dataset(spec, T0, sid(0), steps[0][1]).to_zarr(
        str(theirs), zarr_format=3, consolidated=True, mode="w-", encoding=map_encoding(spec), write_empty_chunks=False)
    slots = [sid(0)]
    for day, grid in steps[1:]:
        group = zarr.open_group(str(theirs), mode="r+", zarr_format=3, use_consolidated=False)
        i = slots.index(sid(day)) if sid(day) in slots else len(slots)
        seconds = np.datetime64((T0 + timedelta(days=day)).replace(tzinfo=None), "s").astype(np.int64)
        row = {"elevation": grid.elevation, "elevation_std": grid.elevation_std, "point_count": grid.point_count,
               "time": seconds, "points_outside": np.uint64(grid.outside), "scan_id": sid(day)}
        for name, value in row.items():
            a = group[name].with_config({"write_empty_chunks": False})
            if i == len(slots):
                a.resize((i + 1, *a.shape[1:]))
            a[i : i + 1] = np.asarray(value, a.dtype if name != "scan_id" else object)[np.newaxis]
        slots[i:i + 1] = [sid(day)]
        zarr.consolidate_metadata(str(theirs))
    mine, ref = _files(ours), _files(theirs)
    assert sorted(mine) == sorted(ref)
    assert [name for name in mine if mine[name] != ref[name]] == []
    maps = {n for n in mine if n.startswith("elevation/c/")}
    assert maps == ({f"elevation/c/{t}/0/{c}" for t in (0, 1) for c in (0, 1)} if case == "several-shards"
                    else {"elevation/c/0/0/0", "elevation/c/1/0/0"})
