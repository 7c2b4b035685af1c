"""Describe the Zarr cubes already on a shelf, for the grids Collection.

Reading a cube's metadata and coordinates (small) is enough; the data chunks are only touched
to fingerprint the store so that ``verify`` can find bit rot in it too.
"""

from __future__ import annotations

import hashlib
from datetime import datetime, timezone
from typing import TYPE_CHECKING, Protocol

from archive.catalog.store import ShelfFiles, multihash_sha256
from archive.storage import find_files

if TYPE_CHECKING:
    import numpy as np

    from archive.catalog.collections import GridInfo


class HashMemo(Protocol):
    """Where object hashes of a store are kept between runs (the migration ledger is one)."""

    def object_hashes(self, store: str) -> dict[str, tuple[int, float, str]]: ...

    def keep_object_hashes(self, store: str, hashes: dict[str, tuple[int, float, str]]) -> None: ...


def store_fingerprint(shelf: ShelfFiles, href: str, memo: HashMemo | None = None) -> tuple[int, str]:
    """(total bytes, multihash) of a directory store.

    The digest is SHA-256 over the sorted lines ``<path inside store>\\t<size>\\t<sha256>\\n``,
    so it changes when any object in the store changes, is added or is removed. With a ``memo``,
    an object whose size and modification time are those of its memo entry is not read again:
    a cube that grew by one epoch costs that epoch's objects, not the whole cube. (Bit rot in an
    unread object is still found by ``verify``, which reads everything.)
    """
    base = shelf.path(href).rstrip("/")
    known = memo.object_hashes(href) if memo is not None else {}
    seen: dict[str, tuple[int, float, str]] = {}
    digest, total = hashlib.sha256(), 0
    for path, info in sorted(find_files(shelf.fs, base).items()):
        rel = path[len(base) + 1 :] if path.startswith(base + "/") else path
        size, mtime = int(info["size"]), info.get("mtime")
        hit = known.get(rel)
        if hit is not None and mtime is not None and hit[0] == size and hit[1] == mtime:
            inner = hit[2]
        else:
            inner = shelf.sha256(f"{href.rstrip('/')}/{rel}")
        if mtime is not None:
            seen[rel] = (size, mtime, inner)
        total += size
        digest.update(f"{rel}\t{size}\t{inner}\n".encode())
    if memo is not None:
        memo.keep_object_hashes(href, seen)
    return total, multihash_sha256(digest.hexdigest())


def discover_grids(shelf: ShelfFiles) -> list[GridInfo]:
    """Every ``grids/*.zarr`` on the shelf, described from its own metadata."""
    found = []
    for path in sorted(shelf.fs.glob(shelf.path("grids/*.zarr"))):
        rel = "grids/" + path.rstrip("/").rsplit("/", 1)[-1]
        name = rel[len("grids/") : -len(".zarr")]
        station, _, product = name.partition("-")
        found.append(_describe(_CfStore.open(shelf.fs.get_mapper(path)), rel, station, product or "elevation"))
    return found


class _CfStore:
    """A Zarr v3 store seen as xarray's ``open_zarr`` sees it (variables, coordinates, sizes, in
    its order), read through zarr alone: describing cubes at the end of every migrate run should
    not import xarray and dask. Only the small coordinates are read."""

    def __init__(self, group) -> None:
        self.group = group
        arrays = dict(group.arrays())
        self.dims = {n: tuple(a.metadata.dimension_names or ()) for n, a in arrays.items()}
        coords = set(str(group.attrs.get("coordinates", "")).split())
        for a in arrays.values():
            coords.update(str(a.attrs.get("coordinates", "")).split())
        coords.update(n for n, d in self.dims.items() if d == (n,))  # dimension coordinates
        self.data_vars = [n for n in arrays if n not in coords]
        self.coords = [n for n in arrays if n in coords]
        self.sizes: dict[str, int] = {}
        for n in self.data_vars + self.coords:
            for dim, size in zip(self.dims[n], arrays[n].shape):
                self.sizes.setdefault(dim, int(size))

    @classmethod
    def open(cls, store) -> _CfStore:
        import warnings

        import zarr

        with warnings.catch_warnings():  # the cube's Quantize filter is a numcodecs codec: known
            warnings.filterwarnings("ignore", message="Numcodecs codecs are not in the Zarr version 3", category=UserWarning)
            return cls(zarr.open_group(store, mode="r", zarr_format=3))

    def attrs(self, name: str) -> dict:
        return dict(self.group[name].attrs)

    def values(self, name: str) -> np.ndarray:
        return self.group[name][...]

    def times(self) -> np.ndarray:
        """The ``time`` coordinate decoded from CF units (integer offsets exactly, else by xarray)."""
        import numpy as np

        raw, attrs = self.values("time"), self.attrs("time")
        unit, _, since = str(attrs.get("units", "")).partition(" since ")
        step = {"days": "D", "hours": "h", "minutes": "m", "seconds": "s", "milliseconds": "ms", "microseconds": "us"}.get(unit)
        if step and np.issubdtype(raw.dtype, np.integer) and attrs.get("calendar", "standard") in ("standard", "gregorian", "proleptic_gregorian"):
            try:
                return np.datetime64(since.strip().replace(" ", "T"), "us") + raw.astype(f"timedelta64[{step}]")
            except ValueError:
                pass
        import xarray as xr  # another encoding: let xarray's CF decoder read it

        return xr.decode_cf(xr.Dataset({"time": ("time", raw, attrs)}))["time"].values


def _describe(ds: _CfStore, rel: str, station: str, product: str) -> GridInfo:
    from pyproj import CRS

    from archive.catalog.collections import GridInfo  # pystac, pyproj: publish needs only store_fingerprint

    crs_wkt = None
    for name in ("spatial_ref", "crs"):
        if name in ds.dims:
            crs_wkt = ds.attrs(name).get("crs_wkt") or ds.attrs(name).get("spatial_ref")
    if crs_wkt is None:
        raise ValueError(f"{rel} has no spatial_ref/crs_wkt attribute; rewrite the cube with its CRS")
    crs = CRS.from_wkt(crs_wkt)
    auth = crs.to_authority()
    x, y = ds.values("x"), ds.values("y")
    cell = float(abs(x[1] - x[0])) if len(x) > 1 else None
    half = (cell or 0.0) / 2
    start = end = None
    if "time" in ds.coords and ds.sizes.get("time", 0):
        times = ds.times().astype("datetime64[us]")
        start, end = (_utc(t) for t in (times.min(), times.max()))
    variables = {
        v: {
            "dimensions": list(ds.dims[v]),
            "unit": ds.attrs(v).get("units"),
            "description": ds.attrs(v).get("long_name"),
        }
        for v in ds.data_vars
        if v not in ("spatial_ref", "crs")
    }
    return GridInfo(
        href=rel,
        station=station,
        product=product,
        variables=variables,
        dims=dict(ds.sizes),
        start=start,
        end=end,
        bbox=(float(x.min()) - half, float(y.min()) - half, float(x.max()) + half, float(y.max()) + half),
        crs_wkt=crs.to_wkt(),
        crs_code=f"{auth[0]}:{auth[1]}" if auth else None,
        cell=cell,
    )


def _utc(t: np.datetime64) -> datetime:
    return datetime.fromisoformat(str(t)).replace(tzinfo=timezone.utc)
