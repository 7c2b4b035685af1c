"""A station's elevation cube in Zarr v3: one time step per scan, appended as scans arrive.

Two layouts live in one store, because no single chunking serves both common reads:

* the root group ("map layout") holds shards of one epoch — ``(1, SY, SX)`` with SY, SX the
  map rounded up to whole inner chunks of ``(1, 256, 256)``, split only when a shard would hold
  more than 16 MB of raw values (so an object is at most ~16 MB on the wire, and a map is one
  or a few objects). Reading one epoch's map is one object and almost exactly its own bytes;
  appending an epoch only *adds* objects (the arrays along time grow by one), so earlier epochs' chunks
  are never rewritten. Inner chunks with no data are not stored (``write_empty_chunks=False``).
  zarr writes the metadata and the 1-D arrays; each epoch's map shards are encoded here with
  the same codecs (numcodecs Quantize and Zstd, google-crc32c) and written whole, byte for byte
  what zarr's sharding writer stores (tests compare), in about half its CPU time.
* the ``series`` group ("series layout") is a derived copy built by
  :func:`archive.grids.series.write_series` after a batch of appends: shards of all epochs over
  a square of pixels, sized from the map and the number of epochs (see ``series_shape``), so
  one pixel's whole time series is one shard index plus one small chunk. :func:`open_cube`
  refuses it when it is stale (its scan ids differ from the root's) or unfinished.

Elevations are float32 rounded by numcodecs' Quantize filter to ``QUANTIZE_DIGITS`` decimal
places of a metre before zstd (the variable's ``scanshelf:quantize`` attribute says so): below
the 1 mm scale of the scanners' coordinates, and it lets zstd drop the noise bits.

Scans may arrive in any order (parallel or resumed migrations): steps are stored in arrival
order with a ``scan_id`` coordinate along time, and :func:`open_cube` returns them sorted by
time. Writing a scan id that is already present replaces its step in place (never a duplicate).
One writer per station cube at a time.
"""

from __future__ import annotations

import functools
import json
import math
import os
import uuid
import warnings
from collections.abc import Iterable
from dataclasses import dataclass
from datetime import datetime, timezone
from typing import TYPE_CHECKING

import google_crc32c
import numcodecs
import numpy as np
import zarr
from pyproj import CRS
from zarr.codecs import ZstdCodec
from zarr.codecs.numcodecs import Quantize

from archive.crashpoints import crash_point
from archive.grids.binning import EpochGrid
from archive.grids.spec import GridSpec
from archive.storage import filesystem, is_local

if TYPE_CHECKING:
    import xarray as xr

SPEC_ATTR = "scanshelf:grid_spec"
SERIES_GROUP = "series"
SERIES_COMPLETE = "scanshelf:series_complete"
MAP_CHUNK = 256  # inner chunk edge of the map layout (cells)
MAP_SHARD_BYTES = 16 << 20  # raw bytes of one map-layout shard at most (objects of ≤ ~16 MB)
QUANTIZE_DIGITS = 3  # decimal places of a metre kept in elevation and elevation_std (≤ 0.5 mm error)
ZSTD_LEVEL = 3  # of every cube object; the map shards written here and zarr's metadata must agree
SERIES_OBJECTS = 1536  # series-layout shards per station cube at most (3 variables) ...
SERIES_OBJECTS_PER_EPOCH = 8  # ... plus this many per epoch: long records afford smaller shard indexes
TIME_CHUNK = 4096  # 1-D time/scan_id coordinates: one small object, rewritten on append
TIME_UNITS = "seconds since 1970-01-01"  # time is stored as int64 whole seconds in these units
CUBE_VARS = ("elevation", "elevation_std", "point_count")

warnings.filterwarnings("ignore", message="Consolidated metadata is currently not part", category=UserWarning)
# the Quantize filter is a numcodecs codec (zarr-python and numcodecs read it; the attribute says so)
warnings.filterwarnings("ignore", message="Numcodecs codecs are not in the Zarr version 3", category=UserWarning)

VARIABLE_ATTRS = {
    "elevation": {
        "units": "m",
        "long_name": "mean elevation of the points in the cell",
        "standard_name": "surface_altitude",
        "cell_methods": "area: mean",
    },
    "elevation_std": {
        "units": "m",
        "long_name": "population standard deviation (ddof=0) of point elevations in the cell",
        "cell_methods": "area: standard_deviation",
    },
    "point_count": {"units": "1", "long_name": "number of points in the cell"},
}


def _utc(t: datetime) -> np.datetime64:
    if t.tzinfo is None:
        raise ValueError(f"scan time {t!r} must be timezone-aware (UTC)")
    return np.datetime64(t.astimezone(timezone.utc).replace(tzinfo=None), "ns")


def spatial_ref_attrs(spec: GridSpec) -> dict:
    """CF grid-mapping attributes (``crs_wkt`` & co. from pyproj) plus GDAL's ``GeoTransform``."""
    attrs = CRS.from_user_input(spec.crs_wkt).to_cf() if spec.crs_wkt else {}
    attrs["GeoTransform"] = " ".join(str(v) for v in spec.transform.to_gdal())
    return attrs


def axis_attrs(spec: GridSpec) -> dict[str, dict]:
    """CF attributes of the ``x`` and ``y`` coordinates (units from the CRS's first axis)."""
    crs = CRS.from_user_input(spec.crs_wkt) if spec.crs_wkt else None
    unit = (crs.axis_info[0].unit_name if crs and crs.axis_info else "m").replace("metre", "m")
    return {"x": {"standard_name": "projection_x_coordinate", "long_name": "easting of cell centre", "units": unit, "axis": "X"},
            "y": {"standard_name": "projection_y_coordinate", "long_name": "northing of cell centre", "units": unit, "axis": "Y"}}


def coords_for(spec: GridSpec) -> dict:
    import xarray as xr

    axes = axis_attrs(spec)
    return {"x": xr.Variable("x", spec.x, axes["x"]), "y": xr.Variable("y", spec.y, axes["y"]),
            "spatial_ref": xr.Variable((), np.int64(0), spatial_ref_attrs(spec))}


FLOAT_VARS = ("elevation", "elevation_std")


def quantize_attrs(name: str) -> dict:
    """What a reader must know about the stored precision of a float variable."""
    if name not in FLOAT_VARS:
        return {}
    bits = math.ceil(QUANTIZE_DIGITS * math.log2(10))  # Quantize keeps this many fraction bits
    return {"scanshelf:quantize": f"numcodecs Quantize(digits={QUANTIZE_DIGITS}): values rounded to multiples "
                                  f"of 2^-{bits} m; error <= {2.0 ** -bits / 2:.2e} m"}


def variable_attrs(spec: GridSpec, name: str) -> dict:
    """CF attributes of a cube variable along time (without the encoding's own)."""
    if name == "points_outside":
        return {"units": "1", "long_name": "points of the scan outside the station grid (kept in the points archive)"}
    attrs = dict(VARIABLE_ATTRS[name]) | quantize_attrs(name)
    if spec.crs_wkt:
        attrs["grid_mapping"] = "spatial_ref"
    return attrs


TIME_ATTRS = {"standard_name": "time", "long_name": "scan start time (UTC), whole seconds"}


def group_attrs(spec: GridSpec) -> dict:
    return {"Conventions": "CF-1.10", "title": f"elevation cube of station {spec.station}", SPEC_ATTR: spec.to_dict()}


def epoch_dataset(spec: GridSpec, time: datetime, scan_id: str, epoch: EpochGrid) -> xr.Dataset:
    """One time step as a CF-annotated dataset (time length 1), as the cube stores it."""
    import xarray as xr

    data = {name: (("time", "y", "x"), getattr(epoch, name)[np.newaxis], variable_attrs(spec, name)) for name in CUBE_VARS}
    data["points_outside"] = (("time",), np.array([epoch.outside], np.uint64), variable_attrs(spec, "points_outside"))
    ds = xr.Dataset(data, coords=coords_for(spec))
    ds = ds.assign_coords(
        # whole seconds, like the scan id: the cube stores time as int64 seconds (map_encoding), and a
        # sub-second start (real GPS times have them) would otherwise switch the units mid-cube
        time=xr.Variable("time", np.array([_utc(time).astype("datetime64[s]").astype("datetime64[ns]")]), TIME_ATTRS),
        scan_id=xr.Variable("time", np.array([scan_id], dtype=object), {"long_name": "scan id"}),
    )
    ds.attrs = group_attrs(spec)
    return ds


def map_shard(ny: int, nx: int, itemsize: int = 4) -> tuple[tuple[int, int, int], tuple[int, int, int]]:
    """(inner chunk, shard) of the map layout: whole map per epoch, halved until ≤ MAP_SHARD_BYTES."""
    cy, cx = min(MAP_CHUNK, ny), min(MAP_CHUNK, nx)
    sy, sx = math.ceil(ny / cy), math.ceil(nx / cx)  # in inner chunks
    while sy * sx * cy * cx * itemsize > MAP_SHARD_BYTES and sy * sx > 1:
        if sy >= sx:
            sy = math.ceil(sy / 2)
        else:
            sx = math.ceil(sx / 2)
    return (1, cy, cx), (1, sy * cy, sx * cx)


def series_shape(t: int, ny: int, nx: int) -> tuple[tuple[int, int, int], tuple[int, int, int]]:
    """(inner chunk, shard) of the series layout for ``t`` epochs of an ``ny`` × ``nx`` map.

    Shards span all epochs over s × s pixels, s the smallest power of two ≥ 8 that keeps the
    cube within SERIES_OBJECTS + SERIES_OBJECTS_PER_EPOCH · t shards; so shards grow with time
    and their count barely does. A pixel's history costs the shard index (16 B per inner chunk)
    plus one inner chunk of k pixels × t values; k = 2s/√t minimises the sum (16·s²/k + 4·t·k
    bytes). With few epochs the index dominates whatever s is: a pixel is then ~0.5 kB.
    """
    s = 8
    while len(CUBE_VARS) * math.ceil(ny / s) * math.ceil(nx / s) > SERIES_OBJECTS + SERIES_OBJECTS_PER_EPOCH * t:
        s *= 2
    k = 2 * s / math.sqrt(max(1, t))
    bits = max(0, min(2 * int(math.log2(s)), round(math.log2(max(1.0, k)))))
    cy = 2 ** (bits // 2)
    cx = 2 ** (bits - bits // 2)
    return (t, cy, cx), (t, s, s)


def map_encoding(spec: GridSpec) -> dict:
    """Map layout: shards of one epoch (see ``map_shard``), inner chunks (1, 256, 256)."""
    chunk, shard = map_shard(spec.ny, spec.nx)
    enc = {v: {"chunks": chunk, "shards": shard, "compressors": [ZstdCodec(level=ZSTD_LEVEL)]} for v in CUBE_VARS}
    for v in FLOAT_VARS:
        enc[v]["filters"] = [Quantize(digits=QUANTIZE_DIGITS, dtype="<f4")]
    enc["point_count"]["fill_value"] = 0
    enc["time"] = {"chunks": (TIME_CHUNK,), "units": TIME_UNITS, "calendar": "proleptic_gregorian", "dtype": "int64"}
    enc["scan_id"] = {"chunks": (TIME_CHUNK,)}
    enc["points_outside"] = {"chunks": (TIME_CHUNK,)}
    return enc


def map_codecs(name: str, chunk: tuple[int, int, int]) -> list[dict]:
    """The codecs of a map-layout variable as its Zarr v3 metadata states them (see map_encoding)."""
    inner = [{"name": "bytes", "configuration": {"endian": "little"}},
             {"name": "zstd", "configuration": {"level": ZSTD_LEVEL, "checksum": False}}]
    if name in FLOAT_VARS:
        inner.insert(0, {"name": "numcodecs.quantize", "configuration": {"digits": QUANTIZE_DIGITS, "dtype": "<f4"}})
    return [{"name": "sharding_indexed", "configuration": {
        "chunk_shape": list(chunk), "codecs": inner, "index_location": "end",
        "index_codecs": [{"name": "bytes", "configuration": {"endian": "little"}}, {"name": "crc32c"}]}}]


@functools.lru_cache(maxsize=8)
def _shard_order(rows: int, cols: int) -> tuple[tuple[int, int], ...]:
    """Inner chunks of a (1, rows, cols)-chunk shard in the order zarr-python places them: Morton
    order, the row bit before the column bit at each level (a dimension out of bits drops out)."""
    y, x = np.divmod(np.arange(rows * cols), cols)
    code = np.zeros(rows * cols, np.int64)
    bit = 0
    for level in range(max((rows - 1).bit_length(), (cols - 1).bit_length())):
        for axis, n in ((y, rows), (x, cols)):
            if level < (n - 1).bit_length():
                code |= ((axis >> level) & 1) << bit
                bit += 1
    order = np.argsort(code, kind="stable")
    return tuple(zip(y[order].tolist(), x[order].tolist()))


def shard_bytes(chunks: Iterable[tuple[tuple[int, ...], bytes]], grid: tuple[int, ...]) -> bytes:
    """A Zarr v3 shard object (``sharding_indexed``, index at the end): the encoded inner chunks
    in the order given, then the index of (offset, length) uint64 pairs over the shard's chunk
    grid in C order (2^64-1 for a chunk not stored), little-endian, then the index's CRC32C."""
    index = np.full((*grid, 2), 2**64 - 1, "<u8")
    parts, offset = [], 0
    for key, data in chunks:
        index[key] = offset, len(data)
        offset += len(data)
        parts.append(data)
    raw = index.tobytes()
    return b"".join([*parts, raw, google_crc32c.value(raw).to_bytes(4, "little")])


def _map_shards(values: np.ndarray, chunk: tuple[int, int, int], shard: tuple[int, int, int], fill,
                quantize: bool):
    """((shard row, shard column), object bytes or None when every inner chunk is empty) of one
    epoch's (y, x) map, encoded as zarr's sharding codec encodes them with ``map_codecs``.

    The codecs themselves are numcodecs' (Quantize, Zstd), the library zarr calls; what zarr
    adds per inner chunk (a task, two thread hand-offs, a copy and an emptiness test each) cost
    more than the compression itself on a 3.7M-cell map (benchmarks/grid_steps.py). The map
    goes one row of inner chunks at a time (a few MB, in cache for quantizing and compressing),
    padded with the fill value past the map's edge as zarr pads an edge chunk; an inner chunk
    all at the fill value is left out (write_empty_chunks=False); the rest go in zarr's order.
    """
    (_, cy, cx), (_, sy, sx) = chunk, shard
    rows, cols = sy // cy, sx // cx
    zstd = numcodecs.Zstd(level=ZSTD_LEVEL, checksum=False)
    quantizer = numcodecs.Quantize(digits=QUANTIZE_DIGITS, dtype="<f4") if quantize else None
    band = np.empty((cy, sx), values.dtype.newbyteorder("<"))
    ny, nx = values.shape
    for r in range(-(-ny // sy)):
        for c in range(-(-nx // sx)):
            encoded = {}
            for i in range(rows):
                part = values[r * sy + i * cy:r * sy + (i + 1) * cy, c * sx:(c + 1) * sx]
                if part.size == 0:
                    break
                if part.shape != band.shape:
                    band.fill(fill)
                band[:part.shape[0], :part.shape[1]] = part
                tiles = band.reshape(cy, cols, cx)
                full = ~(np.isnan(tiles) if np.isnan(fill) else tiles == fill).all(axis=(0, 2))
                if not full.any():
                    continue
                if quantizer is not None:
                    tiles = quantizer.encode(band).reshape(cy, cols, cx)
                for j in np.flatnonzero(full).tolist():
                    encoded[i, j] = zstd.encode(np.ascontiguousarray(tiles[:, j, :]))
            order = ((key, encoded[key]) for key in _shard_order(rows, cols) if key in encoded)
            yield (r, c), shard_bytes(order, (rows, cols)) if encoded else None


def _write_map_step(fs, path: str, array: zarr.Array, step: int, values: np.ndarray) -> bool:
    """Write time step ``step`` of a map-layout variable (``values`` is (1, y, x)) straight to its
    shard objects, byte for byte what ``array[step:step + 1] = values`` writes (tests compare).
    False, and nothing written, when the array is not laid out as map_encoding lays it out."""
    meta = array.metadata.to_dict()
    chunk, shard = array.chunks, array.shards
    fill = array.fill_value
    plain = (shard is not None and len(shard) == 3 and shard[0] == 1 and chunk[0] == 1
             and shard[1] % chunk[1] == 0 and shard[2] % chunk[2] == 0
             and json.loads(json.dumps(meta["codecs"])) == map_codecs(array.basename, chunk)
             and (np.isnan(fill) if array.dtype == np.float32 else array.dtype == np.uint32))
    if not plain or values.dtype != array.dtype or values.shape != (1, *array.shape[1:]):
        return False
    quantize = array.basename in FLOAT_VARS
    for (r, c), data in _map_shards(values[0], chunk, shard, fill, quantize):
        key = f"{path}/{array.path}/{array.metadata.encode_chunk_key((step, r, c))}"
        if data is None:
            if fs.exists(key):
                fs.rm_file(key)
        elif is_local(fs):  # whole or not at all, like zarr's LocalStore (the same temporary name)
            os.makedirs(os.path.dirname(key), exist_ok=True)
            temp = f"{key}.{uuid.uuid4().hex}.partial"
            try:
                with open(temp, "wb") as f:
                    f.write(data)
                os.replace(temp, key)
            finally:
                if os.path.exists(temp):
                    os.unlink(temp)
        else:
            fs.pipe_file(key, data)
        crash_point("grid.shard")
    return True


def read_spec(cube_url: str, storage_options: dict | None = None) -> GridSpec | None:
    """The spec stored in an existing cube's attributes, or None when there is no cube."""
    fs, path = filesystem(cube_url, storage_options)
    if not fs.exists(f"{path}/zarr.json"):
        return None
    with fs.open(f"{path}/zarr.json", "rb") as f:
        meta = json.load(f)
    d = meta.get("attributes", {}).get(SPEC_ATTR)
    if d is None:
        raise ValueError(f"{cube_url} is a Zarr store but not a scanshelf elevation cube (no {SPEC_ATTR!r} attribute)")
    return GridSpec.from_dict(d)


def _mark_series_stale(cube_url: str, storage_options: dict | None) -> None:
    """Flag the series copy as out of date *before* the root changes (safe if we die between).

    The series group's own metadata says whether it is flagged already (write_series sets the
    flag before it consolidates): then every later append skips a rewrite and a consolidation."""
    fs, path = filesystem(cube_url, storage_options)
    try:
        with fs.open(f"{path}/{SERIES_GROUP}/zarr.json", "rb") as f:
            flagged = json.load(f).get("attributes", {}).get(SERIES_COMPLETE) is False
    except FileNotFoundError:
        return
    if not flagged:
        group = zarr.open_group(zarr_store(cube_url, storage_options), path=SERIES_GROUP, mode="r+",
                                zarr_format=3, use_consolidated=False)
        group.attrs[SERIES_COMPLETE] = False
        zarr.consolidate_metadata(zarr_store(cube_url, storage_options))


def write_epoch(
    cube_url: str,
    spec: GridSpec,
    time: datetime,
    scan_id: str,
    epoch: EpochGrid,
    storage_options: dict | None = None,
) -> int:
    """Add (or replace) one scan's time step; returns its storage index along time.

    The first call creates the cube under a temporary name and renames it into place. No call
    goes through xarray or a dataset (importing xarray and the dask it pulls in costs every
    migrate process and worker about 0.4 CPU-second): the new cube is what xarray's ``to_zarr``
    of :func:`epoch_dataset` with :func:`map_encoding` writes, byte for byte. Later calls grow
    each array along time by one (zarr writes the metadata and the small time/scan_id/
    points_outside objects) and write only the new epoch's map shards (``_write_map_step``,
    byte for byte what zarr would). A scan id already present (or a slot left empty by an
    interrupted append) is overwritten in place.
    """
    existing = read_spec(cube_url, storage_options)
    if existing is None:
        values = _step_values(spec, time, scan_id, epoch)
        fs, path = filesystem(cube_url, storage_options)
        suffix = f".tmp-{uuid.uuid4().hex[:8]}"
        _create(zarr_store(cube_url.rstrip("/") + suffix, storage_options), fs, path.rstrip("/") + suffix, spec, values)
        fs.mv(path.rstrip("/") + suffix, path, recursive=True)
        return 0
    if existing != spec:
        raise ValueError(
            f"{cube_url} was built on a different grid ({existing}); re-grid the station with "
            f"`scanshelf grid SHELF --station {spec.station}` or reuse the stored spec (read_spec)"
        )
    values = _step_values(spec, time, scan_id, epoch)
    _mark_series_stale(cube_url, storage_options)
    store = zarr_store(cube_url, storage_options)
    root = zarr.open_group(store, mode="r+", zarr_format=3, use_consolidated=False)
    arrays = {name: root[name].with_config({"write_empty_chunks": False}) for name in values}
    if arrays["time"].attrs.get("units") != TIME_UNITS:
        raise ValueError(f"{cube_url}: time is not stored in {TIME_UNITS!r}; rebuild the cube with `scanshelf grid`")
    ids = arrays["scan_id"][:]
    slot = np.flatnonzero(ids == scan_id)
    if slot.size == 0:
        slot = np.flatnonzero(ids == "")  # left by an interrupted append, or a retired scan's
    fs, path = filesystem(cube_url, storage_options)
    if slot.size:
        i = int(slot[0])
        for name, a in arrays.items():
            if name not in CUBE_VARS or not _write_map_step(fs, path, a, i, values[name]):
                a[i : i + 1] = values[name]
        return i
    # the root's metadata loses its consolidated copy first and gets it back last: an append cut
    # short shows, and migrate's _repair_cube cuts the arrays back to the shortest. scan_id goes
    # last, so a step with its id is complete
    root.update_attributes({})
    i = int(ids.size)
    for name, a in arrays.items():
        if name in CUBE_VARS:
            a.resize((i + 1, *a.shape[1:]))
            if not _write_map_step(fs, path, a, i, values[name]):
                a[i : i + 1] = values[name]
        else:
            a.append(values[name])  # resize and write in one call: what a resize and an assignment write
    zarr.consolidate_metadata(store)
    return i


# what xarray's CF encoder adds to the attributes it writes: the non-dimension coordinates of a
# variable, and NaN fill values (float64 NaN, base64) of floating-point variables
COORDINATES = "scan_id spatial_ref"
NAN_FILL = "AAAAAAAA+H8="


def _create(store, fs, path: str, spec: GridSpec, values: dict[str, np.ndarray]) -> None:
    """A new cube holding one time step, laid out as ``epoch_dataset(...).to_zarr(encoding=map_encoding(spec),
    consolidated=True, write_empty_chunks=False)`` writes it (tests compare the two byte for byte);
    ``fs`` and ``path`` are the store's filesystem and folder, for the map variables' shards."""
    root = zarr.create_group(store, zarr_format=3, attributes=group_attrs(spec), overwrite=False)
    chunk, shard = map_shard(spec.ny, spec.nx)
    config = {"write_empty_chunks": False}

    def array(name, data, chunks, dims, attrs, fill_value, **codecs):
        a = root.create_array(name, shape=data.shape, dtype=data.dtype if data.dtype != object else str,
                              chunks=chunks, fill_value=fill_value, dimension_names=dims,
                              attributes=attrs, config=config, **codecs)
        if name not in CUBE_VARS or not _write_map_step(fs, path, a, 0, data):
            a[...] = data

    for name in CUBE_VARS:
        attrs = variable_attrs(spec, name) | {"coordinates": COORDINATES}
        fill = 0 if name == "point_count" else np.nan
        if name in FLOAT_VARS:
            attrs["_FillValue"] = NAN_FILL
            codecs = {"filters": [Quantize(digits=QUANTIZE_DIGITS, dtype="<f4")]}
        else:
            codecs = {"filters": None}
        array(name, values[name], chunk, ("time", "y", "x"), attrs, fill, shards=shard,
              compressors=[ZstdCodec(level=ZSTD_LEVEL)], **codecs)
    array("points_outside", values["points_outside"], (TIME_CHUNK,), ("time",),
          variable_attrs(spec, "points_outside") | {"coordinates": COORDINATES}, 0)
    array("scan_id", values["scan_id"], (TIME_CHUNK,), ("time",), {"long_name": "scan id"}, "")
    array("spatial_ref", np.array(0, np.int64), (), None, spatial_ref_attrs(spec), 0)
    array("time", values["time"], (TIME_CHUNK,), ("time",),
          TIME_ATTRS | {"units": TIME_UNITS, "calendar": "proleptic_gregorian"}, 0)
    for axis, attrs in axis_attrs(spec).items():
        coord = getattr(spec, axis)
        array(axis, coord, coord.shape, (axis,), attrs | {"_FillValue": NAN_FILL}, np.nan)
    zarr.consolidate_metadata(store)


def _step_values(spec: GridSpec, time: datetime, scan_id: str, epoch: EpochGrid) -> dict[str, np.ndarray]:
    """One time step of every array along time, as stored (see epoch_dataset and map_encoding);
    scan_id last."""
    shape = (spec.ny, spec.nx)
    for name in CUBE_VARS:
        if getattr(epoch, name).shape != shape:
            raise ValueError(f"{name} of scan {scan_id} is {getattr(epoch, name).shape}, the grid of "
                             f"{spec.station} is {shape}: bin it on the cube's spec (read_spec)")
    seconds = _utc(time).astype("datetime64[s]").astype(np.int64)  # whole seconds, as epoch_dataset
    return {
        "elevation": epoch.elevation.astype(np.float32, copy=False)[np.newaxis],
        "elevation_std": epoch.elevation_std.astype(np.float32, copy=False)[np.newaxis],
        "point_count": epoch.point_count.astype(np.uint32, copy=False)[np.newaxis],
        "time": np.array([seconds], np.int64),
        "points_outside": np.array([epoch.outside], np.uint64),
        "scan_id": np.array([scan_id], dtype=object),
    }


@dataclass(frozen=True)
class CubeSteps:
    """A cube's live time steps in time order, read through zarr alone (no xarray or dask):
    for pages and previews that read a few whole epochs, in processes that should not pay for
    importing xarray. ``open_cube`` gives the same steps as a dataset."""

    group: zarr.Group
    slots: np.ndarray  # storage index along time of each step
    times: np.ndarray  # datetime64[ns], whole seconds
    scan_ids: list[str]

    def read(self, name: str, step: int) -> np.ndarray:
        """One step's (y, x) map of ``name``, decoded as zarr stores it (NaN where empty)."""
        return self.group[name][int(self.slots[step])]


def cube_steps(url: str, storage_options: dict | None = None) -> CubeSteps:
    """The steps of the cube at ``url`` that hold a scan, sorted by time as :func:`open_cube` sorts them."""
    root = zarr.open_group(zarr_store(url, storage_options), mode="r", zarr_format=3, use_consolidated=True)
    if root["time"].attrs.get("units") != TIME_UNITS:
        raise ValueError(f"{url}: time is not stored in {TIME_UNITS!r}; rebuild the cube with `scanshelf grid`")
    ids, seconds = root["scan_id"][:], root["time"][:]
    live = np.flatnonzero(ids != "")
    slots = live[np.argsort(seconds[live], kind="stable")]
    times = seconds[slots].astype("datetime64[s]").astype("datetime64[ns]")
    return CubeSteps(root, slots, times, [str(v) for v in ids[slots]])


def open_cube(
    url: str,
    storage_options: dict | None = None,
    layout: str = "map",
) -> xr.Dataset:
    """The cube as a lazy dask-backed dataset sorted by time.

    ``layout="map"`` reads whole-map shards (one object per epoch): for maps and differences.
    ``layout="series"`` reads the time-series copy (one object per 16 × 16 pixels, all epochs):
    for pixel or small-window histories; it raises if the copy is missing or stale.
    """
    if layout not in ("map", "series"):
        raise ValueError("layout must be 'map' or 'series'")
    import xarray as xr

    # dask chunks = whole shards: one request per epoch map (see FIELD-NOTES "Zarr v3"); the
    # 1-D time coordinates are stored in longer chunks, which xarray warns about: harmless here
    store = zarr_store(url, storage_options)
    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", message="The specified chunks separate", category=UserWarning)
        root = xr.open_zarr(store, zarr_format=3, consolidated=True, chunks={"time": 1, "y": -1, "x": -1})
    # the 1-D variables are read whole, without dask: through the chunks above, a cube of N
    # epochs would read its one scan_id object N times
    small = xr.open_zarr(store, zarr_format=3, consolidated=True, chunks=None)
    root = root.assign_coords(scan_id=small["scan_id"].load())
    root["points_outside"] = small["points_outside"].load()
    if layout == "series":
        try:
            ds = xr.open_zarr(zarr_store(url, storage_options), group=SERIES_GROUP, zarr_format=3,
                              consolidated=True, chunks=None)
            _, shard = series_shape(ds.sizes["time"], ds.sizes["y"], ds.sizes["x"])
            ds = ds.chunk({"time": -1, "y": shard[1], "x": shard[2]})
        except (FileNotFoundError, KeyError, zarr.errors.GroupNotFoundError) as e:
            raise ValueError(f"{url} has no series copy; build it with archive.grids.write_series") from e
        live = root["scan_id"].values
        live = set(live[live != ""])
        if not ds.attrs.get(SERIES_COMPLETE) or set(ds["scan_id"].values) != live:
            raise ValueError(f"the series copy of {url} is stale; rebuild it with archive.grids.write_series")
        return ds.assign_coords(scan_id=ds["scan_id"].load())
    ok = root["scan_id"].values != ""
    if not ok.all():
        root = root.isel(time=np.flatnonzero(ok))
    if root.indexes["time"].is_monotonic_increasing:  # appended in time order: no reindexing graph
        return root
    return root.sortby("time")


def zarr_store(url: str, storage_options: dict | None = None):
    """A zarr-python store for a local path or any fsspec URL."""
    from fsspec.implementations.local import LocalFileSystem
    from zarr.storage import FsspecStore, LocalStore

    fs, path = filesystem(url, storage_options)
    if isinstance(fs, LocalFileSystem):
        return LocalStore(path)
    return FsspecStore.from_url(url, storage_options=storage_options or None)
