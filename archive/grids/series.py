"""The time-series copy of a cube: one pixel's whole history in one small read.

Layout: Zarr v3 arrays in the cube's ``series`` group, shards of all epochs over s × s pixels
holding inner chunks of (T, cy, cx) (both from :func:`archive.grids.cube.series_shape`), float
variables through the same Quantize filter as the map layout, every inner chunk zstd-compressed.
Chunks holding only the fill value (pixels never observed) are not stored, and shards with no
stored chunk are not written (zarr's ``write_empty_chunks=False`` behaviour). Reading a pixel =
the shard index (16 B per inner chunk + 4 B CRC) + one compressed chunk.

zarr-python spends 0.7–1.4 ms per inner chunk when writing (measured here: 37k chunks of
(50, 1, 1) took 25–50 s), which would make this copy take minutes for a large map. So zarr
writes the array metadata and coordinates, and this module writes the shard objects directly
in the Zarr v3 sharding format (``sharding_indexed``: the inner chunks' bytes, then the index of
(offset, nbytes) uint64 pairs in C order of the chunk grid, little-endian, with its CRC32C),
encoding each chunk with the codecs the array metadata names (numcodecs Quantize, bytes
little-endian, zstd); the tests read them back with zarr-python and compare with the map layout.
"""

from __future__ import annotations

import dask.array as da
import numcodecs
import numpy as np
import xarray as xr
import zarr
from zarr.codecs import ZstdCodec
from zarr.codecs.numcodecs import Quantize

from archive.grids.cube import (CUBE_VARS, FLOAT_VARS, QUANTIZE_DIGITS, SERIES_COMPLETE, SERIES_GROUP, ZSTD_LEVEL,
                                open_cube, series_shape, shard_bytes, zarr_store)
from archive.storage import filesystem

BLOCK = 256  # cells per side read from the map layout at a time: its inner chunk, so nothing is decoded twice


def encode_shard(block: np.ndarray, chunk: tuple[int, int], shard: int, fill, quantize: bool) -> bytes | None:
    """One shard from a (T, ≤shard, ≤shard) block; None when every chunk holds only ``fill``."""
    t = block.shape[0]
    cy, cx = chunk
    ny, nx = shard // cy, shard // cx
    full = np.full((t, shard, shard), fill, dtype=block.dtype.newbyteorder("<"))
    full[:, : block.shape[1], : block.shape[2]] = block
    if quantize:  # elementwise, so the whole shard at once equals the filter applied chunk by chunk
        full = numcodecs.Quantize(QUANTIZE_DIGITS, dtype="<f4").encode(full).reshape(full.shape)
    # (ny, nx, T, cy, cx): each inner chunk's values contiguous, in the C order zarr expects
    tiles = np.ascontiguousarray(full.reshape(t, ny, cy, nx, cx).transpose(1, 3, 0, 2, 4))
    flat = tiles.reshape(ny, nx, -1)
    empty = np.isnan(flat).all(axis=2) if np.isnan(fill) else (flat == fill).all(axis=2)
    if empty.all():
        return None
    zstd = numcodecs.Zstd(level=ZSTD_LEVEL)
    return shard_bytes((((j, i), bytes(zstd.encode(tiles[j, i].tobytes()))) for j, i in zip(*np.nonzero(~empty))),
                       (ny, nx))


def _skeleton(ds: xr.Dataset, url: str, storage_options: dict | None) -> tuple[tuple, tuple]:
    """Metadata and coordinates through xarray/zarr; the data arrays stay unwritten."""
    t = max(1, ds.sizes["time"])
    chunk, shard = series_shape(t, ds.sizes["y"], ds.sizes["x"])
    lazy = xr.Dataset(
        {v: (ds[v].dims, da.zeros(ds[v].shape, dtype=ds[v].dtype, chunks=shard), ds[v].attrs) for v in CUBE_VARS},
        coords={k: c.variable.copy(deep=False) for k, c in ds.coords.items()},
        attrs={**ds.attrs, SERIES_COMPLETE: False},
    )
    for v in lazy.variables.values():
        v.encoding = {}
    enc = {v: {"chunks": chunk, "shards": shard, "compressors": [ZstdCodec(level=ZSTD_LEVEL)]} for v in CUBE_VARS}
    for v in FLOAT_VARS:
        enc[v]["filters"] = [Quantize(digits=QUANTIZE_DIGITS, dtype="<f4")]
    enc["point_count"]["fill_value"] = 0
    enc["time"] = {"units": "seconds since 1970-01-01", "calendar": "proleptic_gregorian", "dtype": "int64"}
    lazy.to_zarr(zarr_store(url, storage_options), group=SERIES_GROUP, zarr_format=3, consolidated=False,
                 mode="w", encoding=enc, compute=False)
    return chunk, shard


def write_series(cube_url: str, storage_options: dict | None = None) -> None:
    """(Re)build the time-series copy from the map layout, sorted by time.

    A full rewrite (one read of the cube plus one write of the copy); run it once after a batch
    of appends, not per scan. The copy is flagged complete only at the end, so an interrupted
    rebuild is never read as current.
    """
    ds = open_cube(cube_url, storage_options)
    ds = ds[list(CUBE_VARS)].assign_coords(scan_id=ds["scan_id"])
    chunk, shard = _skeleton(ds, cube_url, storage_options)
    fs, root = filesystem(cube_url, storage_options)
    group = zarr.open_group(zarr_store(cube_url, storage_options), mode="r+", zarr_format=3, use_consolidated=False)
    ny, nx = ds.sizes["y"], ds.sizes["x"]
    s = shard[1]
    edge = max(BLOCK, s)  # a whole number of series shards and of map-layout inner chunks
    for name in CUBE_VARS:
        meta = group[f"{SERIES_GROUP}/{name}"].metadata
        fill = np.float32(np.nan) if name in FLOAT_VARS else 0
        for y0 in range(0, ny, edge):
            for x0 in range(0, nx, edge):
                block = ds[name][:, y0:y0 + edge, x0:x0 + edge].values  # memory: T × edge² values
                files = {}
                for jy in range(0, block.shape[1], s):
                    for ix in range(0, block.shape[2], s):
                        data = encode_shard(block[:, jy:jy + s, ix:ix + s], chunk[1:], s, fill, name in FLOAT_VARS)
                        if data is not None:
                            key = meta.encode_chunk_key((0, (y0 + jy) // s, (x0 + ix) // s))
                            files[f"{root}/{SERIES_GROUP}/{name}/{key}"] = data
                for parent in {f.rsplit("/", 1)[0] for f in files}:
                    fs.makedirs(parent, exist_ok=True)  # local folders; a no-op on object stores
                if files:
                    fs.pipe(files)
    group[SERIES_GROUP].attrs[SERIES_COMPLETE] = True
    zarr.consolidate_metadata(zarr_store(cube_url, storage_options))
