"""Lazy xarray access to a station's Zarr v3 cube, counted like every other read.

Zarr's fsspec store needs an asynchronous filesystem, so the shelf's filesystem is reopened in
async mode (sync ones such as local and memory are wrapped) under the same request counter.
The cube opens from its consolidated metadata (no listing, which plain HTTP cannot do), and
dask chunks follow the shard shape so a bulk read is one GET per shard.
"""

from __future__ import annotations

import warnings
from typing import TYPE_CHECKING

import xarray as xr

from archive.query.iostats import CountingFileSystem
from archive.storage import filesystem

if TYPE_CHECKING:
    from archive.query.shelf import Shelf


def _async_fs(shelf: Shelf) -> CountingFileSystem:
    inner, root = filesystem(shelf._raw_url, {**shelf._storage_options, "asynchronous": True})
    if not inner.async_impl:
        from fsspec.implementations.asyn_wrapper import AsyncFileSystemWrapper

        inner = AsyncFileSystemWrapper(inner, asynchronous=True)
    return CountingFileSystem(root.rstrip("/"), inner, shelf.io, asynchronous=True)


def open_cube(shelf: Shelf, path: str) -> xr.Dataset:
    """Open ``path`` (shelf-relative ``grids/....zarr``) lazily with shard-shaped dask chunks."""
    from zarr.storage import FsspecStore

    store = FsspecStore(_async_fs(shelf), path=path, read_only=True)
    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", message=".*[Cc]onsolidated metadata.*")
        try:
            ds = xr.open_zarr(store, zarr_format=3, consolidated=True, chunks=None)
        except FileNotFoundError:
            raise FileNotFoundError(
                f"{shelf.url}: no grid cube at {path}; list the station's products in "
                "grids/collection.json"
            ) from None
    chunks: dict[str, int] = {}
    for var in ds.data_vars.values():
        shape = var.encoding.get("shards") or var.encoding.get("chunks")
        if shape:
            for dim, size in zip(var.dims, shape):
                chunks.setdefault(dim, int(size))
    return ds.chunk(chunks) if chunks else ds
