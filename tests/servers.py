"""Shared fixtures for storage tests: a small synthetic shelf, nginx and an S3 endpoint.

Servers are real processes on 127.0.0.1 and a free port, started and stopped here. When a
server cannot be found and CI=true, the test fails with the install step to run; outside CI
it is skipped with the same message.
"""

from __future__ import annotations

import contextlib
import hashlib
import json
import os
import shutil
import socket
import subprocess
import time
from dataclasses import dataclass
from datetime import UTC, datetime, timedelta
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from archive import layout
from archive.points.coords import AxisEncoding

CRS_CODE = "EPSG:32633"  # a real projected CRS; the site itself is invented
ORIGIN = (512_000.0, 5_420_000.0)
SIDE = 200.0  # metres, every scan covers the same square
TILES = 8  # 8 x 8 tiles, one row group each, in serpentine order
# a window of ~2% of one scan's area; edges at half-millimetres so no stored point sits on one
BOX = (ORIGIN[0] + 60.0005, ORIGIN[1] + 90.0005, ORIGIN[0] + 88.2845, ORIGIN[1] + 118.2845)
SCANS = (
    # station, UTC time, points, encoding of x/y/z
    ("north", datetime(2026, 3, 1, 6, 0, tzinfo=UTC), 64_000, "las"),
    ("north", datetime(2026, 3, 8, 6, 0, tzinfo=UTC), 64_000, "text"),
    ("south", datetime(2026, 3, 4, 12, 30, tzinfo=UTC), 32_000, "las"),
)


_SHARED: dict[str, object] = {}


def _once(name: str, start):
    """Yield one shared instance per session even when several test modules import the fixture."""
    if name in _SHARED:
        yield _SHARED[name]
        return
    gen = start()
    _SHARED[name] = next(gen)
    try:
        yield _SHARED[name]
    finally:
        del _SHARED[name]
        next(gen, None)


def require(found: bool, what: str) -> None:
    """Fail in CI (the service is part of the contract there), skip elsewhere."""
    if found:
        return
    message = f"{what} is not available; install it with .ci/install-servers (apt-get install -y nginx) and the test extras"
    if os.environ.get("CI") == "true":
        pytest.fail(message)
    pytest.skip(message)


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _wait_port(port: int, proc: subprocess.Popen | None = None, timeout: float = 10.0) -> None:
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if proc is not None and proc.poll() is not None:
            raise RuntimeError(f"server exited with code {proc.returncode}")
        try:
            with socket.create_connection(("127.0.0.1", port), timeout=0.2):
                return
        except OSError:
            time.sleep(0.05)
    raise RuntimeError(f"nothing listens on 127.0.0.1:{port} after {timeout} s")


# --- the synthetic shelf -------------------------------------------------------------------

def _encoding(kind: str, axis: int) -> AxisEncoding:
    if kind == "text":
        return AxisEncoding.for_text(3)
    return AxisEncoding.for_las(0.001, (ORIGIN[0], ORIGIN[1], 0.0)[axis])


def scan_points(seed: int, n: int, kind: str) -> tuple[pa.Table, dict]:
    """Points tile by tile (serpentine), each tile one row group, like a Hilbert-sorted scan."""
    rng = np.random.default_rng(seed)
    size = SIDE / TILES
    encs = [_encoding(kind, a) for a in range(3)]
    tiles = []
    per = n // (TILES * TILES)
    for row in range(TILES):
        cols = range(TILES) if row % 2 == 0 else reversed(range(TILES))
        for col in cols:
            x = ORIGIN[0] + (col + rng.random(per)) * size
            y = ORIGIN[1] + (row + rng.random(per)) * size
            z = 300.0 + 0.05 * (x - ORIGIN[0]) + rng.normal(0, 0.2, per)
            tiles.append((x, y, z))
    x, y, z = (np.concatenate([t[i] for t in tiles]) for i in range(3))
    arrays = {}
    for name, values, enc in zip("xyz", (x, y, z), encs):
        raw = np.rint((values - enc.offset) / enc.scale).astype(np.int64)
        arrays[name] = enc.from_las(raw) if kind == "las" else enc.from_float(raw * 0.001 + enc.offset)[0]
    m = x.size
    arrays["intensity"] = pa.array(rng.integers(0, 65535, m, dtype=np.uint16))
    arrays["return_number"] = pa.array(rng.integers(1, 4, m, dtype=np.uint8))
    arrays["classification"] = pa.array(rng.choice(np.array([2, 3, 5], np.uint8), m))
    arrays["gps_time"] = pa.array(np.sort(rng.uniform(0, 600, m)) + 1e9)
    axes = {a: e.to_dict() for a, e in zip("xyz", encs)}
    return pa.table(arrays), axes


def _bbox_wgs84(xmin, ymin, xmax, ymax):
    from pyproj import Transformer

    t = Transformer.from_crs(CRS_CODE, "EPSG:4326", always_xy=True)
    return t.transform_bounds(xmin, ymin, xmax, ymax)


def build_shelf(root: Path) -> list[dict]:
    """Write a small shelf in the documented layout and return one dict per scan."""
    import shapely
    from pyproj import CRS

    crs = CRS.from_user_input(CRS_CODE)
    rows, scans = [], []
    for seed, (station, when, n, kind) in enumerate(SCANS):
        sid = layout.ScanId(station, when)
        table, axes = scan_points(seed, n, kind)
        meta = {"scan_id": str(sid), "station": station, "crs": crs.to_json_dict(), "axes": axes}
        table = table.replace_schema_metadata({"scanshelf": json.dumps(meta)})
        path = root / layout.points_path(sid)
        path.parent.mkdir(parents=True, exist_ok=True)
        pq.write_table(
            table, path, row_group_size=n // (TILES * TILES), compression="zstd",
            store_decimal_as_integer=True, write_statistics=["x", "y", "z"], use_dictionary=False,
        )
        data = path.read_bytes()
        xs, ys, zs = (np.asarray(_enc_floats(table, a, axes)) for a in "xyz")
        pbox = [xs.min(), ys.min(), zs.min(), xs.max(), ys.max(), zs.max()]
        wbox = _bbox_wgs84(pbox[0], pbox[1], pbox[3], pbox[4])
        end = when + timedelta(seconds=600)
        href = layout.points_path(sid)
        item = {
            "type": "Feature", "stac_version": "1.1.0", "id": str(sid),
            "geometry": shapely.geometry.mapping(shapely.box(*wbox)), "bbox": list(wbox),
            "properties": {
                "datetime": when.isoformat().replace("+00:00", "Z"),
                "start_datetime": when.isoformat().replace("+00:00", "Z"),
                "end_datetime": end.isoformat().replace("+00:00", "Z"),
                "proj:code": CRS_CODE, "proj:bbox": pbox, "pc:count": n,
                "scanshelf:station": station,
            },
            "links": [],
            "assets": {"points": {"href": f"../../../{href}", "type": "application/vnd.apache.parquet"}},
        }
        rows.append({
            "id": str(sid), "collection": "scans", "datetime": when, "start_datetime": when,
            "end_datetime": end, "geometry": shapely.to_wkb(shapely.box(*wbox)),
            "bbox": dict(zip(("xmin", "ymin", "xmax", "ymax"), wbox)),
            "scanshelf:station": station, "proj:code": CRS_CODE, "proj:bbox": pbox, "pc:count": n,
            "scanshelf:partial": False,
            "assets": {"points": {
                "href": href, "type": "application/vnd.apache.parquet", "file:size": len(data),
                "file:checksum": "1220" + hashlib.sha256(data).hexdigest(),
            }},
            "item_json": json.dumps(item),
        })
        scans.append({"id": str(sid), "path": path, "href": href, "size": len(data), "axes": axes})
    _write_index(root, rows)
    (root / layout.CATALOG).write_text(json.dumps({
        "type": "Catalog", "stac_version": "1.1.0", "id": "test-shelf",
        "description": "synthetic shelf for storage tests",
        "links": [{"rel": "root", "href": "./catalog.json"}, {"rel": "child", "href": "./scans/collection.json"}],
    }))
    (root / layout.SCANS_COLLECTION).write_text(json.dumps({
        "type": "Collection", "stac_version": "1.1.0", "id": "scans", "description": "scans",
        "license": "CC-BY-4.0", "extent": {}, "links": [], "summaries": {"proj:code": [CRS_CODE]},
    }))
    (root / layout.LEDGER).write_bytes(b"SQLite format 3\x00 local ledger stand-in")
    _write_cube(root)
    return scans


def _enc_floats(table: pa.Table, axis: str, axes: dict) -> np.ndarray:
    from archive.points.coords import units_of

    return AxisEncoding.from_dict(axes[axis]).to_float(units_of(table[axis]))


def _write_index(root: Path, rows: list[dict]) -> None:
    ts = pa.timestamp("us", tz="UTC")
    file_t = pa.struct([("href", pa.string()), ("type", pa.string()), ("file:size", pa.int64()), ("file:checksum", pa.string())])
    schema = pa.schema([
        ("id", pa.string()), ("collection", pa.string()), ("datetime", ts), ("start_datetime", ts),
        ("end_datetime", ts), ("geometry", pa.binary()),
        ("bbox", pa.struct([(k, pa.float64()) for k in ("xmin", "ymin", "xmax", "ymax")])),
        ("scanshelf:station", pa.string()), ("proj:code", pa.string()),
        ("proj:bbox", pa.list_(pa.float64())), ("pc:count", pa.int64()), ("scanshelf:partial", pa.bool_()),
        ("assets", pa.struct([("points", file_t), ("thumbnail", file_t)])), ("item_json", pa.string()),
    ])
    geo = {"version": "1.1.0", "primary_column": "geometry", "columns": {"geometry": {
        "encoding": "WKB", "geometry_types": ["Polygon"], "covering": {"bbox": {
            k: ["bbox", k] for k in ("xmin", "ymin", "xmax", "ymax")}}}}}
    table = pa.Table.from_pylist(rows, schema=schema).replace_schema_metadata({"geo": json.dumps(geo)})
    path = root / layout.SCANS_INDEX
    path.parent.mkdir(parents=True, exist_ok=True)
    pq.write_table(table, path)


def _write_cube(root: Path) -> None:
    """A tiny sharded Zarr v3 elevation cube for station north (two epochs)."""
    import xarray as xr

    x = ORIGIN[0] + 0.5 + np.arange(40.0) * 5
    y = ORIGIN[1] + 0.5 + np.arange(40.0) * 5
    time_ = np.array(["2026-03-01T06:00", "2026-03-08T06:00"], dtype="datetime64[ns]")
    elev = (300.0 + 0.05 * (x[None, None, :] - ORIGIN[0]) + np.zeros((2, 40, 1))).astype(np.float32)
    elev[1] += 0.25
    ds = xr.Dataset({"elevation": (("time", "y", "x"), elev)}, coords={"time": time_, "y": y, "x": x})
    ds["elevation"].attrs["units"] = "m"
    ds.to_zarr(
        root / layout.grid_path("north"), zarr_format=3, consolidated=True, mode="w",
        encoding={"elevation": {"chunks": (1, 10, 10), "shards": (1, 20, 20)}},
    )


@pytest.fixture(scope="session")
def shelf_dir(tmp_path_factory):
    """(root, scans) of the synthetic shelf, built once per session."""

    def start():
        root = tmp_path_factory.mktemp("shelf")
        yield root, build_shelf(root)

    yield from _once("shelf", start)


# --- nginx ---------------------------------------------------------------------------------

LOG_FORMAT = "$request_method $uri $status $body_bytes_sent \"$http_range\""


@dataclass
class Nginx:
    """nginx serving ``root`` at ``url``; ``hits()`` parses its own access log."""

    root: Path
    url: str
    log: Path

    def mark(self) -> int:
        return self.log.stat().st_size if self.log.exists() else 0

    def hits(self, since: int = 0, at_least: int = 0, uri_has: str = "", timeout: float = 10.0) -> list[tuple[str, str, int, int]]:
        """(method, uri, status, body bytes) per request logged after offset ``since`` whose uri
        contains ``uri_has``.

        nginx writes a request's log line after it has sent the response, so a client can have
        its bytes before the line exists, and a request made before ``since`` can be logged after
        it: wait (up to ``timeout`` s) until ``at_least`` matching lines are in.
        """
        deadline = time.monotonic() + timeout
        while True:
            with open(self.log, "rb") as f:
                f.seek(since)
                data = f.read()
            lines = data.decode().splitlines()
            if data and not data.endswith(b"\n"):
                lines = lines[:-1]  # a line still being written
            out = []
            for line in lines:
                method, uri, status, nbytes = line.split(" ")[:4]
                if uri_has in uri:
                    out.append((method, uri, int(status), int(nbytes)))
            if len(out) >= at_least or time.monotonic() > deadline:
                return out
            time.sleep(0.02)


@pytest.fixture(scope="session")
def nginx(tmp_path_factory):
    """nginx on 127.0.0.1 serving a fresh folder (``Nginx.root``)."""
    binary = nginx_binary()
    require(binary is not None, "nginx")

    def start():
        with serve_with_nginx(tmp_path_factory.mktemp("nginx"), binary) as server:
            yield server

    yield from _once("nginx", start)


def nginx_binary() -> str | None:
    return shutil.which("nginx") or ("/usr/sbin/nginx" if Path("/usr/sbin/nginx").exists() else None)


@contextlib.contextmanager
def serve_with_nginx(prefix: Path, binary: str):
    """nginx on 127.0.0.1:<free port> serving ``prefix/www``; usable outside pytest (benchmarks)."""
    root = prefix / "www"
    root.mkdir(exist_ok=True)
    port = free_port()
    temp = "".join(f"  {k}_temp_path {prefix}/{k};\n" for k in ("client_body", "proxy", "fastcgi", "uwsgi", "scgi"))
    user = "user root;\n" if os.geteuid() == 0 else ""  # workers must read root-owned temp folders
    conf = prefix / "nginx.conf"
    conf.write_text(
        f"{user}daemon off;\nworker_processes 1;\npid {prefix}/nginx.pid;\nerror_log {prefix}/error.log;\n"
        "events { worker_connections 64; }\n"
        "http {\n"
        f"  log_format counted '{LOG_FORMAT}';\n  access_log {prefix}/access.log counted;\n{temp}"
        "  default_type application/octet-stream;\n"
        f"  server {{\n    listen 127.0.0.1:{port};\n    root {root};\n  }}\n}}\n"
    )
    proc = subprocess.Popen([binary, "-p", str(prefix), "-c", str(conf), "-e", str(prefix / "error.log")],
                            stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
    try:
        _wait_port(port, proc)
    except RuntimeError as e:
        proc.kill()
        raise RuntimeError(f"nginx did not start: {e}: {proc.stderr.read().decode()[-500:]}") from None
    try:
        yield Nginx(root, f"http://127.0.0.1:{port}", prefix / "access.log")
    finally:
        proc.terminate()
        proc.wait(10)


# --- S3 endpoint ---------------------------------------------------------------------------

S3_KEY, S3_SECRET = "scanshelf-test-key", "s3cr3t-n0t-for-logs-7f3a"


@dataclass
class S3:
    endpoint: str
    bucket: str

    @property
    def options(self) -> dict:
        return {"endpoint_url": self.endpoint, "key": S3_KEY, "secret": S3_SECRET}


@pytest.fixture(scope="session")
def s3_endpoint():
    """moto's S3 server on 127.0.0.1 with one empty bucket."""
    yield from _once("s3", _start_s3)


def _start_s3():
    try:
        import s3fs
        from moto.server import ThreadedMotoServer
    except ImportError:
        require(False, "moto[server] and s3fs (pip install 'scanshelf[test]')")
    saved = dict(os.environ)
    # s3fs wants credentials and a region even against a local endpoint (see FIELD-NOTES)
    os.environ.update({
        "AWS_ACCESS_KEY_ID": S3_KEY, "AWS_SECRET_ACCESS_KEY": S3_SECRET,
        "AWS_EC2_METADATA_DISABLED": "true", "AWS_CONFIG_FILE": "/dev/null",
        "AWS_SHARED_CREDENTIALS_FILE": "/dev/null",
    })
    port = free_port()
    server = ThreadedMotoServer(ip_address="127.0.0.1", port=port, verbose=False)
    server.start()
    _wait_port(port)
    s3 = S3(f"http://127.0.0.1:{port}", "shelves")
    s3fs.S3FileSystem(**s3.options, skip_instance_cache=True).mkdir(s3.bucket)  # no region: see notes
    yield s3
    server.stop()
    os.environ.clear()
    os.environ.update(saved)
