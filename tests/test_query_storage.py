"""One storage test class, run against a local folder, memory://, nginx and an S3 endpoint.

The same published shelf is found, read and subset through each; answers are checked
against things we did not write: DuckDB over the source files, the LAS coordinate formula,
and xarray's own Zarr reader.
"""

from __future__ import annotations

import hashlib
import io
import uuid
from dataclasses import dataclass

import duckdb
import fsspec
import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq
import pytest
import xarray as xr

from archive import layout
from archive.points.coords import AxisEncoding, units_of
from archive.publish import publish
from archive.query import open_shelf
from tests.servers import BOX, CRS_CODE, ORIGIN, SIDE, nginx, s3_endpoint, shelf_dir  # noqa: F401 (fixtures)


@dataclass
class Target:
    name: str
    url: str
    options: dict


@pytest.fixture(scope="module", params=["local", "memory", "nginx", "s3"])
def target(request, shelf_dir, tmp_path_factory) -> Target:
    root, _ = shelf_dir
    name = request.param
    if name == "local":
        dest = str(tmp_path_factory.mktemp("published") / "site")
        t = Target(name, dest, {})
    elif name == "memory":
        dest = f"memory://published-{uuid.uuid4().hex[:8]}"
        t = Target(name, dest, {})
    elif name == "nginx":
        server = request.getfixturevalue("nginx")
        dest = str(server.root / "site")
        t = Target(name, f"{server.url}/site", {})
    else:
        s3 = request.getfixturevalue("s3_endpoint")
        dest = f"s3://{s3.bucket}/site"
        t = Target(name, dest, s3.options)
    publish(str(root), dest, t.options if name == "s3" else None)
    return t


def duckdb_inside(path, box) -> list[tuple]:
    # reference: DuckDB's own Parquet reader and SQL filter, over the source file
    return duckdb.execute(
        "SELECT x::VARCHAR, y::VARCHAR, z::VARCHAR FROM read_parquet(?) "
        "WHERE x BETWEEN ? AND ? AND y BETWEEN ? AND ? ORDER BY x, y, z",
        [str(path), box[0], box[2], box[1], box[3]],
    ).fetchall()


class TestStorage:
    def test_published_layout(self, target, shelf_dir):
        root, _ = shelf_dir
        fs, base = fsspec.url_to_fs(target.url, **target.options)
        manifest = pq.read_table(io.BytesIO(fs.cat_file(f"{base}/{layout.MANIFEST}")))
        paths = manifest["path"].to_pylist()
        assert layout.CATALOG in paths and layout.SCANS_INDEX in paths
        assert layout.LEDGER not in paths  # the ledger stays local
        for path, size, digest in zip(paths, manifest["size"].to_pylist(), manifest["sha256"].to_pylist()):
            data = (root / path).read_bytes()
            assert (size, digest) == (len(data), hashlib.sha256(data).hexdigest())
        remote = fs.cat_file(f"{base}/{layout.CATALOG}")
        assert remote == (root / layout.CATALOG).read_bytes()
        with pytest.raises(FileNotFoundError):
            fs.cat_file(f"{base}/{layout.LEDGER}")

    def test_find(self, target):
        shelf = open_shelf(target.url, target.options)
        assert str(shelf.crs.to_epsg()) == CRS_CODE.split(":")[1]
        every = shelf.find()
        assert [s.id for s in every] == [
            "north-20260301T060000Z", "south-20260304T123000Z", "north-20260308T060000Z"]
        assert len(shelf.find(station="north")) == 2
        assert [s.id for s in shelf.find(start="2026-03-02", end="2026-03-05")] == ["south-20260304T123000Z"]
        assert len(shelf.find(start=np.datetime64("2026-03-08T06:05"))) == 1  # inside the scan's span
        assert len(shelf.find(bbox=(ORIGIN[0] - 500, ORIGIN[1] - 500, ORIGIN[0] - 400, ORIGIN[1] - 400))) == 0
        first = every[0]
        assert first.item.id == first.id and first.item.properties["pc:count"] == first.point_count
        assert "north-20260301T060000Z" in repr(every)
        assert list(every.to_pandas()["point_count"]) == [64_000, 32_000, 64_000]

    def test_find_in_wgs84(self, target):
        from pyproj import Transformer

        # reference: pyproj transform of our native window to longitude/latitude
        t = Transformer.from_crs(CRS_CODE, "EPSG:4326", always_xy=True)
        lon_lat = t.transform_bounds(*BOX)
        shelf = open_shelf(target.url, target.options)
        scans = shelf.find(bbox=lon_lat, crs="EPSG:4326")
        assert len(scans) == 3
        inner = scans.bbox
        assert inner[0] <= BOX[0] + 1e-6 and inner[2] >= BOX[2] - 1e-6  # covers the native window

    def test_read_points_equals_duckdb(self, target, shelf_dir):
        _, scans = shelf_dir
        shelf = open_shelf(target.url, target.options)
        found = shelf.find(bbox=BOX)
        table = found.read_points(exact=True)
        for scan in scans:
            mine = table.filter(pc.equal(table["scan_id"], scan["id"]))
            got = sorted(zip(*(mine[c].cast(pa.string()).to_pylist() for c in "xyz")))
            assert got == duckdb_inside(scan["path"], BOX)
            assert len(got) > 0
        assert set(table.column_names) >= {"x", "y", "z", "intensity", "gps_time", "scan_id"}

    def test_floats_follow_the_las_formula(self, target, shelf_dir):
        _, scans = shelf_dir
        shelf = open_shelf(target.url, target.options)
        found = shelf.find(bbox=BOX, station="north", end="2026-03-01")
        exact = found.read_points(columns=["x", "y"], exact=True)
        floats = found.read_points(columns=["x", "y"])
        assert floats["x"].type == pa.float64()
        axes = scans[0]["axes"]
        for axis in ("x", "y"):
            enc = AxisEncoding.from_dict(axes[axis])
            raw = (units_of(exact[axis]) - enc._shift) // enc._step
            # reference: ASPRS LAS 1.4 "Point Data Records": coordinate = X * scale + offset
            expected = raw.astype(np.float64) * axes[axis]["scale"] + axes[axis]["offset"]
            np.testing.assert_array_equal(floats[axis].to_numpy(), expected)

    def test_read_fetches_little(self, target, shelf_dir):
        _, scans = shelf_dir
        shelf = open_shelf(target.url, target.options)
        found = shelf.find(bbox=BOX, station="north", end="2026-03-01")
        before = shelf.io.snapshot()
        table = found.read_points(columns=["x", "y", "z"])
        cost = shelf.io.snapshot() - before
        assert table.num_rows > 0
        assert cost.requests <= 3  # footer + coalesced ranges
        assert cost.bytes < 0.25 * scans[0]["size"]

    def test_to_dask_is_lazy_and_equal(self, target):
        shelf = open_shelf(target.url, target.options)
        found = shelf.find(bbox=BOX)
        before = shelf.io.snapshot()
        frame = found.to_dask(columns=["x", "y", "intensity"])
        assert frame.npartitions == 3
        lazy_cost = shelf.io.snapshot() - before
        assert lazy_cost.requests <= 2  # one footer for the schema, nothing else
        got = frame.compute().sort_values(["x", "y"]).reset_index(drop=True)
        want = found.read_points(columns=["x", "y", "intensity"]).to_pandas()
        want = want.sort_values(["x", "y"]).reset_index(drop=True)
        assert len(got) == len(want) > 0
        np.testing.assert_array_equal(got["x"].to_numpy(), want["x"].to_numpy())
        np.testing.assert_array_equal(got["intensity"].to_numpy(), want["intensity"].to_numpy())

    def test_grids_match_xarray(self, target):
        shelf = open_shelf(target.url, target.options)
        cube = shelf.grids("north")
        assert cube["elevation"].chunks[1][0] == 20  # dask chunks follow the 20 x 20 shards
        one = cube["elevation"].isel(time=1).sel(x=ORIGIN[0] + 50.5, y=ORIGIN[1] + 50.5).values
        # reference: xarray.open_zarr over the same URL
        url = f"{target.url}/{layout.grid_path('north')}"
        theirs = xr.open_zarr(url, storage_options=target.options or None, zarr_format=3, consolidated=True)
        assert float(one) == float(theirs["elevation"].isel(time=1).sel(x=ORIGIN[0] + 50.5, y=ORIGIN[1] + 50.5))
        assert float(one) == pytest.approx(300.0 + 0.05 * 50.5 + 0.25, abs=1e-4)

    def test_refuses_escaping_href(self, target, shelf_dir):
        shelf = open_shelf(target.url, target.options)
        index = shelf.index
        assets = index["assets"].to_pylist()
        assets[0]["points"]["href"] = "../../etc/passwd"
        shelf.__dict__["index"] = index.set_column(
            index.column_names.index("assets"), "assets", pa.array(assets, index["assets"].type))
        with pytest.raises(ValueError, match="escapes the shelf root"):
            shelf.find()


def test_two_percent_read_from_nginx_log(nginx, shelf_dir):
    """The server's own access log: a ~2% window of one scan moves well under 25% of its bytes."""
    root, scans = shelf_dir
    publish(str(root), str(nginx.root / "logged"))
    shelf = open_shelf(f"{nginx.url}/logged")
    found = shelf.find(bbox=BOX, station="north", end="2026-03-01")
    mark, before = nginx.mark(), shelf.io.snapshot()
    table = found.read_points(columns=["x", "y", "z"])
    counted = shelf.io.snapshot() - before
    # points files only: the catalog's items.parquet, read before the mark, may be logged after it
    hits = [h for h in nginx.hits(mark, at_least=counted.requests, uri_has="/points/") if h[1].endswith(".parquet")]
    sent = sum(h[3] for h in hits)
    area = (BOX[2] - BOX[0]) * (BOX[3] - BOX[1]) / SIDE**2
    print(f"nginx log: {len(hits)} requests, {sent:,} bytes of a {scans[0]['size']:,}-byte file "
          f"for {area:.1%} of its area ({table.num_rows} points)")
    assert 0.015 < area < 0.025
    assert [h for h in hits if h[2] != 206] == []  # range requests only
    assert len(hits) <= 3
    assert sent < 0.25 * scans[0]["size"]
    assert (counted.requests, counted.bytes) == (len(hits), sent)  # Shelf.io agrees with the server


def test_missing_server_fails_in_ci(monkeypatch):
    from tests.servers import require

    monkeypatch.setenv("CI", "true")
    with pytest.raises(pytest.fail.Exception, match="install-servers"):
        require(False, "nginx")
    monkeypatch.setenv("CI", "false")
    with pytest.raises(pytest.skip.Exception, match="install-servers"):
        require(False, "nginx")
    require(True, "nginx")  # present: nothing happens
