"""What the health report says about a shelf: scans per station, gaps in coverage, problems.

Reads only what any reader of a published shelf can fetch (``catalog.json``, the scans
Collection, the items index, ``survey.parquet``), plus the ledger when the shelf is a local
folder. The ledger never leaves the machine, so for a published shelf the problems come from
the Items' ``scanshelf:problems`` / ``scanshelf:partial`` fields and the published survey.
"""

from __future__ import annotations

import io
import json
import sqlite3
from collections.abc import Sequence
from dataclasses import dataclass, field
from datetime import datetime, timedelta, timezone

import pandas as pd
import pyarrow.parquet as pq

from archive import layout
from archive.catalog.store import ShelfFiles
from archive.hrefs import redact, safe_href
from archive.storage import is_local

GAP_FACTOR = 1.5  # an interval longer than this many median intervals is a gap (our own rule of thumb)


@dataclass(frozen=True)
class Gap:
    """A stretch between two consecutive scans that is unusually long for its station."""

    start: datetime  # the scan before the gap
    end: datetime  # the scan after it

    @property
    def length(self) -> timedelta:
        return self.end - self.start


def find_gaps(times: Sequence[datetime], factor: float = GAP_FACTOR) -> tuple[list[Gap], timedelta | None]:
    """Gaps (intervals > ``factor`` × median interval) and the median interval itself.

    The median makes the rule follow each station's own rhythm (hourly or monthly) and keeps
    one long outage from raising its own threshold. Fewer than two distinct times: no interval.
    """
    stamps = pd.DatetimeIndex(pd.to_datetime(list(times), utc=True)).unique().sort_values()
    if len(stamps) < 2:
        return [], None
    steps = stamps[1:] - stamps[:-1]
    median = steps.median()
    gaps = [
        Gap(stamps[i].to_pydatetime(), stamps[i + 1].to_pydatetime())
        for i, step in enumerate(steps)
        if step > factor * median
    ]
    return gaps, median.to_pytimedelta()


@dataclass(frozen=True)
class ScanRow:
    """One scan as the items index lists it."""

    id: str
    station: str
    time: datetime
    points: int
    size: int
    partial: bool
    problems: tuple[str, ...]
    source_path: str | None
    points_href: str | None  # shelf-relative
    item_href: str  # shelf-relative


@dataclass(frozen=True)
class Problem:
    """Something wrong with a source file or a scan, and where we learnt it."""

    subject: str  # source relpath, or scan id when the source is not known
    status: str  # failed | duplicate | partial | damaged | unusable | note
    reason: str
    origin: str  # ledger | survey | catalog
    station: str | None = None


@dataclass
class StationHealth:
    station: str
    scans: list[ScanRow]
    gaps: list[Gap]
    median_interval: timedelta | None
    problems: list[Problem] = field(default_factory=list)

    @property
    def points(self) -> int:
        return sum(s.points for s in self.scans)

    @property
    def size(self) -> int:
        return sum(s.size for s in self.scans)


@dataclass
class ShelfHealth:
    url: str  # redacted: fit for the page
    title: str
    description: str
    license: str | None
    providers: list[str]
    stations: dict[str, StationHealth]
    unassigned: list[Problem]  # problems of files no station could be given to
    problem_sources: list[str]  # which of ledger / survey / catalog were read

    @property
    def scans(self) -> int:
        return sum(len(s.scans) for s in self.stations.values())

    @property
    def points(self) -> int:
        return sum(s.points for s in self.stations.values())

    @property
    def size(self) -> int:
        return sum(s.size for s in self.stations.values())

    @property
    def problem_count(self) -> int:
        return sum(len(s.problems) for s in self.stations.values()) + len(self.unassigned)


def read_health(shelf_url: str, storage_options: dict | None = None, gap_factor: float = GAP_FACTOR) -> ShelfHealth:
    """Everything the report shows except the pictures, from a local folder or any URL."""
    files = ShelfFiles(shelf_url, storage_options)
    if not files.exists(layout.CATALOG):
        raise FileNotFoundError(
            f"{redact(str(shelf_url))}: no {layout.CATALOG}; give the shelf's root folder or URL "
            "(run `scanshelf migrate` first for a new shelf)"
        )
    catalog = files.read_json(layout.CATALOG)
    collection = files.read_json(layout.SCANS_COLLECTION) if files.exists(layout.SCANS_COLLECTION) else {}
    scans = _scan_rows(files) if files.exists(layout.SCANS_INDEX) else []
    by_station: dict[str, list[ScanRow]] = {}
    for row in scans:
        by_station.setdefault(row.station, []).append(row)
    stations = {}
    for name in sorted(by_station):
        rows = sorted(by_station[name], key=lambda r: r.time)
        gaps, median = find_gaps([r.time for r in rows], gap_factor)
        stations[name] = StationHealth(name, rows, gaps, median)

    problems, sources = _problems(files, scans)
    unassigned = []
    for p in problems:
        if p.station is None:
            unassigned.append(p)
        else:  # a station with problems but no converted scan still gets its section
            stations.setdefault(p.station, StationHealth(p.station, [], [], None)).problems.append(p)
    stations = dict(sorted(stations.items()))
    providers = [p.get("name", "") for p in collection.get("providers", []) if isinstance(p, dict)]
    return ShelfHealth(
        url=redact(str(shelf_url)),
        title=str(catalog.get("title") or catalog.get("id") or "scanshelf shelf"),
        description=str(catalog.get("description") or ""),
        license=collection.get("license") or catalog.get("license"),
        providers=[p for p in providers if p],
        stations=stations,
        unassigned=unassigned,
        problem_sources=sources,
    )


def _scan_rows(files: ShelfFiles) -> list[ScanRow]:
    where = f"{redact(files.url)}/{layout.SCANS_INDEX}"
    table = pq.read_table(io.BytesIO(files.read_bytes(layout.SCANS_INDEX)),
                          columns=["id", "scanshelf:station", "datetime", "pc:count", "scanshelf:partial",
                                   "assets", "item_json"])
    rows = []
    for r in table.to_pylist():
        props = json.loads(r["item_json"]).get("properties", {})
        points = (r["assets"] or {}).get("points") or {}
        scan = layout.ScanId.parse(r["id"])  # refuses ids that would not make safe paths
        rows.append(ScanRow(
            id=r["id"], station=r["scanshelf:station"], time=r["datetime"].astimezone(timezone.utc),
            points=int(r["pc:count"] or 0), size=int(points.get("file:size") or 0),
            partial=bool(r["scanshelf:partial"]), problems=tuple(props.get("scanshelf:problems") or ()),
            source_path=props.get("scanshelf:source_path"),
            points_href=safe_href(points["href"], f"{where} item {r['id']}") if points.get("href") else None,
            item_href=layout.item_path(scan),
        ))
    return rows


def _problems(files: ShelfFiles, scans: list[ScanRow]) -> tuple[list[Problem], list[str]]:
    """Merge ledger, survey and catalog into one list, one row per file (the ledger wins)."""
    found: dict[str, Problem] = {}
    sources = []
    ledger = _ledger_path(files)
    if ledger is not None:
        sources.append("ledger")
        for p in _ledger_problems(ledger):
            found[p.subject] = p
    if files.exists(layout.SURVEY):
        sources.append("survey")
        for p in _survey_problems(files):
            found.setdefault(p.subject, p)
    sources.append("catalog")
    for s in scans:
        if not (s.partial or s.problems):
            continue
        subject = s.source_path or s.id
        reason = "; ".join(s.problems) or "converted from a damaged file (salvaged points only)"
        if subject not in found or found[subject].status not in ("partial", "failed"):
            status = "partial" if s.partial else "note"
            found[subject] = Problem(subject, status, f"scan {s.id}: {reason}", "catalog", s.station)
    return sorted(found.values(), key=lambda p: (p.station or "", p.subject)), sources


def _ledger_path(files: ShelfFiles) -> str | None:
    """The ledger is read only where it lives: in a local shelf folder."""
    if is_local(files.fs) and files.exists(layout.LEDGER):
        return files.path(layout.LEDGER)
    return None


def _ledger_problems(path: str) -> list[Problem]:
    """Read-only: the report may run while a migration holds the ledger open."""
    db = sqlite3.connect(f"file:{path}?mode=ro", uri=True)
    try:
        rows = db.execute(
            "SELECT relpath, status, station, error FROM files WHERE status IN ('failed', 'duplicate', 'partial')"
        ).fetchall()
    finally:
        db.close()
    return [Problem(rel, status, error or status, "ledger", station) for rel, status, station, error in rows]


def _survey_problems(files: ShelfFiles) -> list[Problem]:
    table = pq.read_table(io.BytesIO(files.read_bytes(layout.SURVEY)),
                          columns=["relpath", "kind", "status", "station", "problems"])
    out = []
    for r in table.to_pylist():
        if r["status"] == "ignored" or r["kind"] == "sidecar":
            continue
        if r["status"] == "ok" and not r["problems"]:
            continue
        status = r["status"] if r["status"] != "ok" else "note"
        out.append(Problem(r["relpath"], status, "; ".join(r["problems"] or []) or status, "survey", r["station"]))
    return out
