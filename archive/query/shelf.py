"""Open a shelf by URL and find scans through its items index.

`find` reads only ``scans/items.parquet`` (one request, cached), so searching a shelf of
thousands of scans never walks JSON. Hrefs from a shelf are untrusted: anything that is not a
plain relative path inside the shelf root is refused.
"""

from __future__ import annotations

import io
import json
import re
from collections.abc import Iterator, Sequence
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from datetime import date, datetime
from functools import cached_property
from typing import Any

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq

from archive import layout
from archive.hrefs import redact, safe_href
from archive.query.iostats import CountingFileSystem, IOStats
from archive.query.points import BBox, ScanFile, join_scans, read_scan
from archive.storage import filesystem

TimeLike = datetime | date | str | np.datetime64 | pd.Timestamp | None
MAX_JSON_BYTES = 8 << 20  # a root catalog is a few KB; a larger one is refused unread


def parse_json(data: bytes | str, where: str) -> Any:
    """JSON from an untrusted shelf: malformed or deeply nested text is refused, naming the file."""
    try:
        return json.loads(data)
    except RecursionError:
        raise ValueError(f"{where}: JSON nested too deeply; refused") from None
    except ValueError as e:
        raise ValueError(f"{where}: not valid JSON ({e}); the file may be damaged or half-written") from None


def as_utc(value: TimeLike, *, end: bool = False) -> pd.Timestamp | None:
    """Datetimes (naive = UTC), ISO 8601 strings and numpy datetime64 → UTC Timestamp.

    A date alone as an end bound means the end of that day, as a reader would expect.
    """
    if value is None:
        return None
    day_only = isinstance(value, date) and not isinstance(value, datetime)
    day_only = day_only or (isinstance(value, str) and re.fullmatch(r"\d{4}-\d{2}-\d{2}", value.strip()))
    ts = pd.Timestamp(value)
    ts = ts.tz_localize("UTC") if ts.tzinfo is None else ts.tz_convert("UTC")
    if end and day_only:
        ts = ts + pd.Timedelta(days=1) - pd.Timedelta(microseconds=1)
    return ts


@dataclass(frozen=True)
class Scan:
    """One scan as the items index describes it; ``item`` gives the full STAC Item."""

    id: str
    station: str
    start: datetime
    end: datetime
    bbox: tuple[float, ...] | None  # native CRS, proj:bbox
    point_count: int
    partial: bool
    href: str  # shelf-relative points file
    size: int
    checksum: str | None
    item_json: str = field(repr=False)

    @cached_property
    def item(self):
        import pystac

        return pystac.Item.from_dict(parse_json(self.item_json, f"item_json of {self.id}"), migrate=False)

    @property
    def file(self) -> ScanFile:
        return ScanFile(self.id, self.href, self.size)


def _overlaps(a: Sequence[float], b: BBox) -> bool:
    n = len(a) // 2
    return not (a[n] < b[0] or a[0] > b[2] or a[n + 1] < b[1] or a[1] > b[3])


class Scans:
    """The scans a `find` matched: iterate, ``len()``, index, read their points."""

    def __init__(self, shelf: Shelf, scans: list[Scan], bbox: BBox | None):
        self.shelf = shelf
        self._scans = scans
        self.bbox = bbox  # the find window in the shelf CRS: default for reads

    def __iter__(self) -> Iterator[Scan]:
        return iter(self._scans)

    def __len__(self) -> int:
        return len(self._scans)

    def __getitem__(self, i: int) -> Scan:
        return self._scans[i]

    @property
    def items(self) -> list:
        """The pystac Items of these scans."""
        return [s.item for s in self._scans]

    def to_pandas(self) -> pd.DataFrame:
        rows = [
            {
                "id": s.id, "station": s.station, "start": s.start, "end": s.end,
                "point_count": s.point_count, "size": s.size, "partial": s.partial, "href": s.href,
            }
            for s in self._scans
        ]
        cols = ["id", "station", "start", "end", "point_count", "size", "partial", "href"]
        return pd.DataFrame(rows, columns=cols)

    def __repr__(self) -> str:
        head = f"<Scans: {len(self)} scan(s) on {self.shelf.url}"
        if self.bbox is not None:
            head += f" within {tuple(round(v, 3) for v in self.bbox)}"
        lines = [head + ">"]
        for s in self._scans[:20]:
            lines.append(f"  {s.id:<32} {s.start:%Y-%m-%d %H:%M}Z  {s.point_count:>12,} points")
        if len(self) > 20:
            lines.append(f"  ... {len(self) - 20} more")
        return "\n".join(lines)

    def central_bbox(self, fraction: float) -> BBox:
        """A box centred on these scans covering ``fraction`` of their joint extent's area."""
        if not 0 < fraction <= 1:
            raise ValueError(f"fraction must be in (0, 1], got {fraction}")
        boxes = [s.bbox for s in self._scans if s.bbox]
        if not boxes:
            raise ValueError("these scans carry no proj:bbox; give an explicit bbox")
        n = [len(b) // 2 for b in boxes]
        xmin, ymin = min(b[0] for b in boxes), min(b[1] for b in boxes)
        xmax = max(b[k] for b, k in zip(boxes, n))
        ymax = max(b[k + 1] for b, k in zip(boxes, n))
        side = fraction**0.5 / 2
        cx, cy, w, h = (xmin + xmax) / 2, (ymin + ymax) / 2, xmax - xmin, ymax - ymin
        return (cx - side * w, cy - side * h, cx + side * w, cy + side * h)

    def _window(self, bbox: Sequence[float] | None, crs: Any) -> BBox | None:
        return self.shelf._native_bbox(bbox, crs) if bbox is not None else self.bbox

    def read_points(
        self,
        bbox: Sequence[float] | None = None,
        columns: list[str] | None = None,
        crs: Any = None,
        exact: bool = False,
        progress: Any = None,
    ) -> pa.Table:
        """Exactly the points inside ``bbox`` (default: the find window) of every scan.

        Only footers and the row groups whose statistics intersect are fetched. ``progress``
        is an optional callable run once per finished scan.
        """
        window = self._window(bbox, crs)
        fs = self.shelf.fs

        def one(scan: Scan) -> pa.Table:
            table = read_scan(fs, scan.file, window, columns, exact)
            if progress is not None:
                progress(scan)
            return table

        with ThreadPoolExecutor(max_workers=8) as pool:
            tables = list(pool.map(one, self._scans))
        if not tables:
            return pa.table({"scan_id": pa.array([], pa.string())})
        joined = join_scans(tables)
        return joined.select([c for c in joined.column_names if c != "scan_id"] + ["scan_id"])

    def to_dask(
        self,
        bbox: Sequence[float] | None = None,
        columns: list[str] | None = None,
        crs: Any = None,
        exact: bool = False,
    ):
        """A lazy dask DataFrame, one partition per scan; nothing is read until computed."""
        import dask.dataframe as dd

        if not self._scans:
            raise ValueError("no scans matched: nothing to read")
        window = self._window(bbox, crs)
        fs = self.shelf.fs
        meta = _empty_frame(fs, self._scans[0].file, columns, exact)
        return dd.from_map(
            _partition, [s.file for s in self._scans], fs=fs, bbox=window, columns=columns,
            exact=exact, meta=meta, enforce_metadata=False,
        )


def _partition(scan: ScanFile, fs, bbox, columns, exact) -> pd.DataFrame:
    return read_scan(fs, scan, bbox, columns, exact).to_pandas()


def _empty_frame(fs, scan: ScanFile, columns, exact) -> pd.DataFrame:
    from archive.query.points import _floats, axes_of, open_footer

    pf, _ = open_footer(fs, scan)
    table = pf.schema_arrow.empty_table()
    if columns is not None:
        table = table.select(columns)
    if not exact:
        table = _floats(table, axes_of(pf.metadata))
    return table.append_column("scan_id", pa.array([], pa.string())).to_pandas()


class Shelf:
    """A shelf opened by URL: local path, https://, s3:// or any fsspec URL."""

    def __init__(self, url: str, storage_options: dict | None = None):
        self.url = redact(str(url))
        self._storage_options = dict(storage_options or {})
        self._raw_url = str(url)
        inner, root = filesystem(self._raw_url, self._storage_options)
        self.io = IOStats()
        self.fs = CountingFileSystem(root.rstrip("/"), inner, self.io)
        try:
            data = self.fs.cat_file(layout.CATALOG, start=0, end=MAX_JSON_BYTES + 1)
        except FileNotFoundError:
            raise FileNotFoundError(
                f"{self.url}: no {layout.CATALOG} at this URL; give the shelf's root "
                "(the folder holding catalog.json), or publish the shelf there first"
            ) from None
        where = f"{self.url}/{layout.CATALOG}"
        if len(data) > MAX_JSON_BYTES:
            raise ValueError(f"{where} is larger than {MAX_JSON_BYTES:,} bytes; refused (a root catalog is a few KB)")
        self.catalog = parse_json(data, where)
        if not isinstance(self.catalog, dict):
            raise ValueError(f"{where}: not a STAC Catalog object; refused")

    def __repr__(self) -> str:
        return f"<Shelf {self.url}>"

    @cached_property
    def index(self) -> pa.Table:
        """The items index (STAC-GeoParquet), read once in one request."""
        try:
            data = self.fs.cat_file(layout.SCANS_INDEX)
        except FileNotFoundError:
            raise FileNotFoundError(
                f"{self.url}: no {layout.SCANS_INDEX}; this shelf has no scans index "
                "(re-run the migration's catalog step)"
            ) from None
        try:
            return pq.read_table(io.BytesIO(data))
        except pa.ArrowException as e:
            raise ValueError(
                f"{self.url}/{layout.SCANS_INDEX}: not a readable Parquet file ({e}); the shelf may be "
                "half-published or damaged: run `scanshelf verify` on it"
            ) from None

    @cached_property
    def crs(self):
        """The shelf's CRS as a pyproj.CRS, or None when the scans carry no CRS."""
        from pyproj import CRS

        if "proj:code" in self.index.column_names:
            codes = [c for c in self.index["proj:code"].to_pylist() if c]
            if codes:
                return CRS.from_user_input(codes[0])
        for text in self.index["item_json"].to_pylist()[:1]:
            props = parse_json(text, f"{self.url}/{layout.SCANS_INDEX} item_json").get("properties", {})
            for key in ("proj:projjson", "proj:wkt2"):
                if props.get(key):
                    return CRS.from_user_input(props[key])
        return None

    def _native_bbox(self, bbox: Sequence[float], crs: Any) -> BBox:
        if len(bbox) != 4:
            raise ValueError(f"bbox must be (xmin, ymin, xmax, ymax), got {bbox!r}")
        xmin, ymin, xmax, ymax = (float(v) for v in bbox)
        if xmin > xmax or ymin > ymax:
            raise ValueError(f"bbox {bbox!r} has min > max; give (xmin, ymin, xmax, ymax)")
        if crs is None:
            return (xmin, ymin, xmax, ymax)
        from pyproj import CRS, Transformer

        if self.crs is None:
            raise ValueError(f"{self.url}: the shelf has no CRS, so a bbox in {crs} cannot be mapped")
        source = CRS.from_user_input(crs)
        if source == self.crs:
            return (xmin, ymin, xmax, ymax)
        t = Transformer.from_crs(source, self.crs, always_xy=True)
        return tuple(float(v) for v in t.transform_bounds(xmin, ymin, xmax, ymax, densify_pts=21))

    def find(
        self,
        bbox: Sequence[float] | None = None,
        start: TimeLike = None,
        end: TimeLike = None,
        station: str | Sequence[str] | None = None,
        crs: Any = None,
    ) -> Scans:
        """Scans whose footprint meets ``bbox`` and whose time span meets [start, end].

        ``bbox`` is (xmin, ymin, xmax, ymax) in the shelf's CRS, or in ``crs`` (e.g.
        "EPSG:4326"). Times: datetimes (naive = UTC), ISO 8601 strings, numpy datetime64.
        """
        window = self._native_bbox(bbox, crs) if bbox is not None else None
        t0, t1 = as_utc(start), as_utc(end, end=True)
        stations = {station} if isinstance(station, str) else set(station) if station else None
        index = self.index
        if stations is not None:
            known = set(index.column("scanshelf:station").to_pylist())
            unknown = sorted(stations - known)
            if unknown:
                raise ValueError(
                    f"{self.url}: no station {', '.join(map(repr, unknown))} on this shelf; its stations are "
                    f"{', '.join(sorted(known)) or 'none yet'}"
                )
        has_proj = "proj:bbox" in index.column_names
        found = []
        for row in index.to_pylist():
            if stations is not None and row["scanshelf:station"] not in stations:
                continue
            begin = row.get("start_datetime") or row["datetime"]
            finish = row.get("end_datetime") or row["datetime"]
            if t0 is not None and finish < t0 or t1 is not None and begin > t1:
                continue
            native = row["proj:bbox"] if has_proj else None
            if window is not None and native and not _overlaps(native, window):
                continue
            points = (row["assets"] or {}).get("points")
            if not points:
                continue
            found.append(
                Scan(
                    id=row["id"], station=row["scanshelf:station"], start=begin, end=finish,
                    bbox=tuple(native) if native else None, point_count=int(row["pc:count"] or 0),
                    partial=bool(row.get("scanshelf:partial")),
                    href=safe_href(points["href"], f"{self.url}/{layout.SCANS_INDEX} item {row['id']}"),
                    size=int(points["file:size"]), checksum=points.get("file:checksum"),
                    item_json=row["item_json"],
                )
            )
        found.sort(key=lambda s: (s.start, s.id))
        return Scans(self, found, window)

    def grids(self, station: str, product: str = "elevation"):
        """A lazy xarray.Dataset over the station's Zarr cube; chunks follow the shards."""
        from archive.query.grids import open_cube

        layout.check_station(station)
        path = layout.grid_path(station, None if product == "elevation" else product)
        return open_cube(self, path)


def open_shelf(url: str, storage_options: dict | None = None) -> Shelf:
    """Open a shelf for finding and reading; nothing but ``catalog.json`` is read yet."""
    return Shelf(url, storage_options)
