"""Where things live inside a shelf.

Every path here is relative to the shelf root and uses forward slashes, so the same
strings serve as local paths, object-store keys and STAC hrefs.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from datetime import datetime, timezone

CATALOG = "catalog.json"
SCANS_COLLECTION = "scans/collection.json"
SCANS_INDEX = "scans/items.parquet"
GRIDS_COLLECTION = "grids/collection.json"
LEDGER = "ledger.sqlite"
MANIFEST = "manifest.parquet"
SURVEY = "survey.parquet"
REPORT = "index.html"

_STATION_RE = re.compile(r"^[A-Za-z0-9][A-Za-z0-9_.]*$")
_SCAN_ID_RE = re.compile(r"^(?P<station>.+)-(?P<stamp>\d{8}T\d{6}Z)$")


def check_station(station: str) -> str:
    """Station ids become path parts and id prefixes, so keep them plain."""
    if not _STATION_RE.match(station):
        raise ValueError(
            f"station id {station!r} must start with a letter or digit and hold only "
            "letters, digits, '_' and '.'; set a station pattern or rename in the site file"
        )
    return station


@dataclass(frozen=True, order=True)
class ScanId:
    """A scan's stable, readable id: ``<station>-<UTC start as YYYYMMDDTHHMMSSZ>``."""

    station: str
    time: datetime  # timezone-aware UTC

    def __post_init__(self) -> None:
        check_station(self.station)
        if self.time.tzinfo is None:
            raise ValueError("ScanId.time must be timezone-aware (UTC)")
        object.__setattr__(self, "time", self.time.astimezone(timezone.utc).replace(microsecond=0))

    def __str__(self) -> str:
        return f"{self.station}-{self.time:%Y%m%dT%H%M%SZ}"

    @classmethod
    def parse(cls, text: str) -> "ScanId":
        m = _SCAN_ID_RE.match(text)
        if not m:
            raise ValueError(f"{text!r} is not a scan id like 'north-20260301T060000Z'")
        t = datetime.strptime(m["stamp"], "%Y%m%dT%H%M%SZ").replace(tzinfo=timezone.utc)
        return cls(m["station"], t)


def points_path(scan: ScanId) -> str:
    return f"points/station={scan.station}/year={scan.time.year:04d}/{scan}.parquet"


def item_path(scan: ScanId) -> str:
    return f"scans/items/{scan.station}/{scan}.json"


def preview_path(scan: ScanId) -> str:
    return f"previews/{scan}.png"


def grid_path(station: str, product: str | None = None) -> str:
    """``grids/<station>.zarr`` for the elevation cube, ``grids/<station>-<product>.zarr`` else."""
    return f"grids/{station}.zarr" if product is None else f"grids/{station}-{product}.zarr"
