"""The time-series copy of a cube: one pixel's whole history in one small read.

Layout: Zarr v3 arrays in the cube's ``series`` group, shard ``(T, 16, 16)`` holding inner
chunks ``(T, 1, 1)`` stored uncompressed (a pixel's elevations barely compress, and raw chunks
have a fixed size). Reading a pixel = the shard index (16 B × 256 + 4 B CRC) + T × 4 bytes.

zarr-python spends 0.7–1.4 ms per inner chunk when writing (measured here: 37k chunks of
(50, 1, 1) took 25–50 s), which would make this copy take minutes for a 500 × 500 map. So zarr
writes the array metadata and coordinates, and this module writes the shard objects directly
in the Zarr v3 sharding format (``sharding_indexed``: the inner chunks' bytes, then the index of
(offset, nbytes) uint64 pairs in C order of the chunk grid, little-endian, with its CRC32C);
the tests read them back with zarr-python and compare with the map layout.
"""

from __future__ import annotations

import dask.array as da
import google_crc32c
import numpy as np
import xarray as xr
import zarr

from archive.grids.cube import (CUBE_VARS, SERIES_COMPLETE, SERIES_GROUP, SERIES_TILE, open_cube,
                                zarr_store)
from archive.storage import filesystem

EMPTY = np.uint64(2**64 - 1)  # index entry of a chunk that is not stored (sharding spec)
BLOCK = 256  # cells per side read from the map layout at a time (memory: T × 256 × 256 values)


def encode_shard(block: np.ndarray, tile: int = SERIES_TILE) -> bytes:
    """One shard of inner chunks (T, 1, 1) from a (T, ≤tile, ≤tile) block, index at the end."""
    t, sy, sx = block.shape
    data = np.ascontiguousarray(block.transpose(1, 2, 0), dtype=block.dtype.newbyteorder("<"))
    nbytes = t * data.itemsize
    index = np.full((1, tile, tile, 2), EMPTY, dtype="<u8")
    index[0, :sy, :sx, 0] = np.arange(sy * sx, dtype=np.uint64).reshape(sy, sx) * np.uint64(nbytes)
    index[0, :sy, :sx, 1] = nbytes
    index_bytes = index.tobytes()
    crc = google_crc32c.value(index_bytes).to_bytes(4, "little")
    return data.tobytes() + index_bytes + crc


def _skeleton(ds: xr.Dataset, url: str, storage_options: dict | None) -> None:
    """Metadata and coordinates through xarray/zarr; the data arrays stay unwritten."""
    t = max(1, ds.sizes["time"])
    ty, tx = min(SERIES_TILE, ds.sizes["y"]), min(SERIES_TILE, ds.sizes["x"])
    lazy = xr.Dataset(
        {v: (ds[v].dims, da.zeros(ds[v].shape, dtype=ds[v].dtype, chunks=(t, ty, tx)), ds[v].attrs) for v in CUBE_VARS},
        coords={k: c.variable.copy(deep=False) for k, c in ds.coords.items()},
        attrs={**ds.attrs, SERIES_COMPLETE: False},
    )
    for v in lazy.variables.values():
        v.encoding = {}
    enc = {v: {"chunks": (t, 1, 1), "shards": (t, SERIES_TILE, SERIES_TILE), "compressors": None} for v in CUBE_VARS}
    enc["point_count"]["fill_value"] = 0
    enc["time"] = {"units": "seconds since 1970-01-01", "calendar": "proleptic_gregorian", "dtype": "int64"}
    lazy.to_zarr(zarr_store(url, storage_options), group=SERIES_GROUP, zarr_format=3, consolidated=False,
                 mode="w", encoding=enc, compute=False)


def write_series(cube_url: str, storage_options: dict | None = None) -> None:
    """(Re)build the time-series copy from the map layout, sorted by time.

    A full rewrite (one read of the cube plus one write of the copy); run it once after a batch
    of appends, not per scan. The copy is flagged complete only at the end, so an interrupted
    rebuild is never read as current.
    """
    ds = open_cube(cube_url, storage_options)
    ds = ds[list(CUBE_VARS)].assign_coords(scan_id=ds["scan_id"])
    _skeleton(ds, cube_url, storage_options)
    fs, root = filesystem(cube_url, storage_options)
    group = zarr.open_group(zarr_store(cube_url, storage_options), mode="r+", zarr_format=3, use_consolidated=False)
    ny, nx = ds.sizes["y"], ds.sizes["x"]
    for name in CUBE_VARS:
        meta = group[f"{SERIES_GROUP}/{name}"].metadata
        for y0 in range(0, ny, BLOCK):
            for x0 in range(0, nx, BLOCK):
                block = ds[name][:, y0:y0 + BLOCK, x0:x0 + BLOCK].values
                files = {}
                for jy in range(0, block.shape[1], SERIES_TILE):
                    for ix in range(0, block.shape[2], SERIES_TILE):
                        key = meta.encode_chunk_key((0, (y0 + jy) // SERIES_TILE, (x0 + ix) // SERIES_TILE))
                        files[f"{root}/{SERIES_GROUP}/{name}/{key}"] = encode_shard(
                            block[:, jy:jy + SERIES_TILE, ix:ix + SERIES_TILE])
                for parent in {f.rsplit("/", 1)[0] for f in files}:
                    fs.makedirs(parent, exist_ok=True)  # local folders; a no-op on object stores
                fs.pipe(files)
    group[SERIES_GROUP].attrs[SERIES_COMPLETE] = True
    zarr.consolidate_metadata(zarr_store(cube_url, storage_options))

