"""Survey: the inventory of a source — every file, what it is, and what is wrong with it.

The same per-file inspection feeds ``migrate``, so what the survey reports is exactly what the
migration will do with each file.
"""

from __future__ import annotations

import fnmatch
import functools
import hashlib
import io
import re
from collections import Counter
from dataclasses import asdict, dataclass, field
from datetime import datetime, timedelta, timezone
from pathlib import PurePosixPath
from typing import Any, Iterable

import pyarrow as pa
import pyarrow.parquet as pq

from archive.frames import LOCAL_FRAME_WKT, declares_no_crs
from archive.layout import check_station
from archive.sitefile import DEFAULT_TIME, SiteFile, load_site_file
from archive.sources import SourceError, classify, open_points, scan_time_of
from archive.storage import filesystem
from archive.timeutil import adjusted_gps_to_utc, gps_week_to_utc, parse_stamp, path_time

HASH_BLOCK = 8 << 20
READ_BUFFER = 256 << 10  # small header reads through the hashing reader; point reads bypass it
HEAD_BYTES = 4096


@dataclass
class FileReport:
    """One source file as the survey found it."""

    relpath: str
    size: int
    kind: str  # points | grid | sidecar | other
    status: str = "ok"  # ok | damaged | unusable | duplicate | ignored
    sha256: str = ""
    format: str = ""
    version: str = ""
    point_format: int | None = None
    station: str | None = None
    scan_time: datetime | None = None
    time_source: str | None = None  # a key of TIME_SOURCES
    declared_count: int | None = None
    point_count: int | None = None  # points that can be read
    bounds: tuple[float, ...] | None = None  # xmin ymin zmin xmax ymax zmax of the readable points
    crs_wkt: str | None = None
    crs_source: str | None = None  # file | site_file
    product: str | None = None  # grid files
    columns: tuple[str, ...] = ()
    duplicate_of: str | None = None
    problems: list[str] = field(default_factory=list)
    mtime: float | None = None
    notes: list[str] = field(default_factory=list)  # worth saying, not damage: waveform not carried, renamed station

    @property
    def usable(self) -> bool:
        return self.status in ("ok", "ignored")

    @property
    def crs_name(self) -> str | None:
        return _crs_name(self.crs_wkt) if self.crs_wkt else None


@functools.lru_cache(maxsize=64)
def _crs_name(wkt: str) -> str:
    """"EPSG:32633" or the CRS's own name; cached, as a source of thousands of files has a few CRSs."""
    from pyproj import CRS

    crs = CRS.from_wkt(wkt)
    auth = crs.to_authority()
    return f"{auth[0]}:{auth[1]}" if auth else crs.name


@dataclass
class SurveyResult:
    source: str
    files: list[FileReport]

    @property
    def ok(self) -> bool:
        return all(f.usable for f in self.files)

    def table(self) -> pa.Table:
        rows = []
        for f in self.files:
            d = asdict(f)
            d["bounds"] = list(f.bounds) if f.bounds else None
            d["columns"] = list(f.columns)
            d["crs"] = f.crs_name
            rows.append(d)
        schema = pa.schema([
            ("relpath", pa.string()), ("kind", pa.string()), ("status", pa.string()), ("format", pa.string()),
            ("version", pa.string()), ("point_format", pa.int16()), ("station", pa.string()),
            ("scan_time", pa.timestamp("us", tz="UTC")), ("time_source", pa.string()),
            ("declared_count", pa.int64()), ("point_count", pa.int64()), ("bounds", pa.list_(pa.float64())),
            ("crs", pa.string()), ("crs_source", pa.string()), ("product", pa.string()), ("size", pa.int64()),
            ("sha256", pa.string()), ("duplicate_of", pa.string()), ("problems", pa.list_(pa.string())),
            ("columns", pa.list_(pa.string())), ("crs_wkt", pa.string()), ("notes", pa.list_(pa.string())),
        ])
        return pa.Table.from_pylist(rows, schema=schema)

    def write(self, path: str, storage_options: dict | None = None) -> None:
        fs, p = filesystem(path, storage_options)
        tmp = p + ".part"
        with fs.open(tmp, "wb") as fh:
            pq.write_table(self.table(), fh)
        fs.mv(tmp, p)

    def summary(self) -> str:
        """A readable account for the terminal: counts by kind and station, then every problem."""
        kinds = Counter(f.kind for f in self.files)
        status = Counter(f.status for f in self.files)
        points = sum(f.point_count or 0 for f in self.files if f.kind == "points" and f.status == "ok")
        stations = Counter(f.station for f in self.files if f.kind == "points" and f.station)
        lines = [
            f"survey of {self.source}: {len(self.files)} files "
            + ", ".join(f"{n} {k}" for k, n in sorted(kinds.items())),
            "status: " + ", ".join(f"{n} {k}" for k, n in sorted(status.items())),
            f"usable points: {points:,} in {sum(1 for f in self.files if f.kind == 'points' and f.status == 'ok')} scans",
        ]
        if stations:
            lines.append("stations: " + ", ".join(f"{s} ({n} files)" for s, n in sorted(stations.items())))
        notes = grouped_notes(self.files)
        if notes:
            lines.append("")
            lines.append("notes:")
            lines += [f"  {n}" for n in notes]
        bad = [f for f in self.files if f.status not in ("ok",) and f.kind != "sidecar"]
        if bad:
            lines.append("")
            lines.append("problems:")
            for f in bad:
                reason = "; ".join(f.problems) or f.status
                lines.append(f"  [{f.status}] {f.relpath}: {reason}")
        return "\n".join(lines)


def grouped_notes(files: Iterable[FileReport]) -> list[str]:
    """Each distinct note once, with the file it concerns or how many files share it."""
    by_note: dict[str, list[str]] = {}
    for f in files:
        for note in f.notes:
            by_note.setdefault(note, []).append(f.relpath)
    return [f"{paths[0]}: {note}" if len(paths) == 1 else f"{len(paths)} files (e.g. {paths[0]}): {note}"
            for note, paths in by_note.items()]


def walk_source(fs, root: str, site_file: SiteFile) -> list[tuple[str, str, int, float | None]]:
    """(path, relpath, size, mtime) of every file under root, sorted, with include/exclude applied."""
    found = fs.find(root, detail=True, withdirs=False)
    out = []
    for path, info in found.items():
        if info.get("type") == "directory":
            continue
        relpath = path[len(root) :].lstrip("/") if path.startswith(root) else PurePosixPath(path).name
        if not _selected(relpath, site_file):
            continue
        out.append((path, relpath, int(info.get("size") or 0), info.get("mtime") or info.get("LastModified")))
    out.sort(key=lambda t: t[1])
    return [(p, r, s, _as_seconds(m)) for p, r, s, m in out]


def _as_seconds(value: Any) -> float | None:
    if value is None:
        return None
    if isinstance(value, datetime):
        return value.timestamp()
    try:
        return float(value)
    except (TypeError, ValueError):
        return None


def _match(relpath: str, pattern: str) -> bool:
    if fnmatch.fnmatchcase(relpath, pattern):
        return True
    if pattern.startswith("**/"):
        return fnmatch.fnmatchcase(relpath, pattern[3:]) or any(
            fnmatch.fnmatchcase("/".join(relpath.split("/")[i:]), pattern[3:]) for i in range(1, relpath.count("/") + 1)
        )
    return False


def _selected(relpath: str, site_file: SiteFile) -> bool:
    return any(_match(relpath, p) for p in site_file.include) and not any(_match(relpath, p) for p in site_file.exclude)


def station_folder(relpath: str, site_file: SiteFile) -> str | None:
    """The part of the path the station pattern picks, before any renaming."""
    m = re.search(site_file.station_pattern, relpath)
    return m.group("station") if m and m.group("station") else None


def station_of(relpath: str, site_file: SiteFile) -> str:
    """Station id from the path: the site file's pattern (default: the first folder), renamed by [stations]."""
    m = re.search(site_file.station_pattern, relpath)
    if not m or not m.group("station"):
        raise SourceError(
            f"{relpath}: cannot tell the station from the path; put the file in a station folder "
            "or set [paths] station in the site file"
        )
    folder = m.group("station")
    rule = site_file.station_rule(folder)
    if rule is not None:
        return check_station(rule.id)
    plain = re.sub(r"[^A-Za-z0-9_.]+", "_", folder).strip("_.")
    if not plain:
        raise SourceError(f"{relpath}: folder {folder!r} gives no usable station id; map it in the site file [stations]")
    return check_station(plain)


def stamp_of(relpath: str, site_file: SiteFile) -> tuple[datetime, bool] | None:
    """Scan time from the path: (time, True) for a date and time, (midnight, False) for a date alone.

    A site file's own [paths] time pattern is tried on the file name, then the whole path; by
    default any folder or the file name may hold the stamp (see ``timeutil.path_time``).
    """
    if site_file.time_pattern != DEFAULT_TIME:
        for text in (PurePosixPath(relpath).name, relpath):
            m = re.search(site_file.time_pattern, text)
            if m and (stamp := parse_stamp(m.group("time"), site_file.zone)) is not None:
                return stamp, True
    return path_time(relpath, site_file.zone)


# Where a scan's time came from, best first (recorded in the survey, the ledger and the Item).
TIME_SOURCES = {
    "gps": "adjusted standard GPS time of the points",
    "path": "date and time stamp in the file name or a folder",
    "gps_week": "GPS week time of the points, week taken from the date in the path",
    "gps_week_header": "GPS week time of the points, week taken from the header's creation date (approximate)",
    "path_date": "date in the file name or a folder, no time of day (approximate: day precision)",
    "header_date": "the header's file creation date (approximate: day precision, may be the processing day)",
    "site_file": "the site file's [times] table",
}


WEEK_SECONDS = 7 * 86400
MISLABELLED_WINDOW = timedelta(days=2 * 366)


def scan_time(relpath: str, header, tally, site_file: SiteFile) -> tuple[datetime, str] | None:
    """The scan's time from the best source the file offers, and that source's name (TIME_SOURCES).

    GPS week time needs a date to find its week; a date alone in the path or header is what it
    refines, so week time resolved by a path date comes before that date itself.
    """
    if tally is not None and (time := scan_time_of(header, tally)) is not None:
        return time, "gps"
    stamp = stamp_of(relpath, site_file)
    if stamp is not None and stamp[1]:
        return stamp[0], "path"
    created = header.creation_date
    day = stamp[0] if stamp is not None else (
        datetime(created.year, created.month, created.day, tzinfo=timezone.utc) if created else None)
    lo, hi = (tally.min_time, tally.max_time) if tally is not None and header.format != "ascii" else (None, None)
    if lo is not None and not header.adjusted_gps_time and day is not None:
        if 0 <= lo and hi < WEEK_SECONDS and hi > 0:  # all zero: the writer stored no time
            when = gps_week_to_utc(lo, day + timedelta(hours=12))
            return when, "gps_week" if stamp is not None else "gps_week_header"
        if (lo < 0 or lo >= WEEK_SECONDS) and abs(lo) < 2e9 and abs(adjusted_gps_to_utc(lo) - day) < MISLABELLED_WINDOW:
            # bit 0 clear, yet the times run past a week and read as adjusted standard time near the
            # file's date: the writer left the bit unset (seen in files of common software)
            return adjusted_gps_to_utc(lo), "gps"
    if stamp is not None:
        return stamp[0], "path_date"
    if created is not None:
        return day, "header_date"
    given = site_file.time_of(relpath)
    if given is not None:
        return given, "site_file"
    return None


def file_sha256(fs, path: str) -> str:
    digest = hashlib.sha256()
    with fs.open(path, "rb") as fh:
        while block := fh.read(HASH_BLOCK):
            digest.update(block)
    return digest.hexdigest()


class _PrefixHash:
    """SHA-256 of one file fed by the reads its inspection makes anyway, so the file is read once.

    A read that extends the hashed prefix is hashed from where the prefix ends; reads behind it or
    beyond it are not (a seek ahead leaves a gap), and `hexdigest` reads whatever no read covered.
    Every byte is hashed once, in file order, whatever the readers do. Use `open` as the reader's
    filesystem.
    """

    def __init__(self, fs, path: str) -> None:
        self.fs, self.path = fs, path
        self.digest = hashlib.sha256()
        self.done = 0

    def open(self, path: str, mode: str = "rb", **kwargs):
        if path != self.path or mode != "rb":
            return self.fs.open(path, mode, **kwargs)
        return io.BufferedReader(_HashedFile(self.fs.open(path, "rb", **kwargs), self), buffer_size=READ_BUFFER)

    def feed(self, position: int, data) -> None:
        view = memoryview(data).cast("B")
        if position <= self.done < position + len(view):
            self.digest.update(view[self.done - position :])
            self.done = position + len(view)

    def hexdigest(self) -> str:
        with self.fs.open(self.path, "rb") as fh:
            fh.seek(self.done)
            while block := fh.read(HASH_BLOCK):
                self.feed(self.done, block)
        return self.digest.hexdigest()


class _HashedFile(io.RawIOBase):
    """A read-only file that shows every byte it reads to a `_PrefixHash`."""

    def __init__(self, raw, hashed: _PrefixHash) -> None:
        self.raw, self.hashed, self.position = raw, hashed, 0

    def readable(self) -> bool:
        return True

    def seekable(self) -> bool:
        return True

    def readinto(self, buffer) -> int:
        view = memoryview(buffer).cast("B")
        n = self.raw.readinto(view) or 0
        self.hashed.feed(self.position, view[:n])
        self.position += n
        return n

    def seek(self, offset: int, whence: int = io.SEEK_SET) -> int:
        self.position = self.raw.seek(offset, whence)
        return self.position

    def tell(self) -> int:
        return self.position

    def close(self) -> None:
        if not self.closed:
            self.raw.close()
        super().close()


def inspect_file(fs, path: str, relpath: str, size: int, site_file: SiteFile, *, deep: bool = True, mtime=None) -> FileReport:
    """Everything the survey reports about one file; never raises for a bad file.

    The checksum comes from the same reads as the inspection (see `_PrefixHash`).
    """
    report = FileReport(relpath=relpath, size=size, kind="other", mtime=mtime)
    hashed = _PrefixHash(fs, path)
    try:
        with fs.open(path, "rb") as fh:
            head = fh.read(HEAD_BYTES)
        hashed.feed(0, head)
        report.kind = classify(relpath, head)
        if report.kind in ("points", "grid"):
            report = _inspect_kind(hashed if report.kind == "points" else fs, path, head, report, site_file, deep)
        report.sha256 = hashed.hexdigest()
    except OSError as exc:
        report.status = "unusable"
        report.problems.append(f"cannot be read ({exc}); check permissions and the storage connection")
        return report
    if report.kind in ("other", "sidecar"):
        report.status = "ignored"
        if report.kind == "other":
            report.problems.append("not a point or grid file; ignored")
    return report


def _inspect_kind(fs, path: str, head: bytes, report: FileReport, site_file: SiteFile, deep: bool) -> FileReport:
    relpath = report.relpath
    try:
        rule = site_file.grid_rule(relpath) if report.kind == "grid" else None  # a [[grids.files]] station wins
        report.station = check_station(rule.station) if rule and rule.station else station_of(relpath, site_file)
        if (folder := station_folder(relpath, site_file)) not in (None, report.station) and not site_file.station_rule(folder):
            report.notes.append(
                f"station folder {folder!r} is named {report.station!r} (station ids keep letters, digits, _ and .); "
                "map it in the site file [stations] to choose another name"
            )
    except (SourceError, ValueError) as exc:
        report.status = "unusable"
        report.problems.append(_reason(exc, relpath))
        return report
    if report.kind == "grid":
        return _inspect_grid(fs, path, report, site_file)
    return _inspect_points(fs, path, head, report, site_file, deep)


def _inspect_points(fs, path: str, head: bytes, report: FileReport, site_file: SiteFile, deep: bool) -> FileReport:
    relpath = report.relpath
    try:
        reader = open_points(fs, path, relpath, report.size, head, site_file)
    except SourceError as exc:
        report.status = "unusable"
        report.problems.append(_reason(exc, relpath))
        return report
    h = reader.header
    report.format, report.version, report.point_format = h.format, h.version, h.point_format
    report.declared_count, report.columns = h.declared_count, h.columns
    report.problems.extend(h.problems)
    report.notes.extend(h.notes)
    if deep:
        try:
            bounds = reader.measure()
        except SourceError as exc:
            report.status = "unusable"
            report.problems.append(_reason(exc, relpath))
            return report
        report.point_count = reader.tally.points
        report.bounds = bounds
        report.problems.extend(p for p in reader.tally.problems if p not in report.problems)
        if reader.tally.points == 0 and "file declares zero points" not in report.problems:
            report.problems.append("no readable points")
    else:
        report.point_count = h.declared_count
        report.bounds = h.bounds
    found = scan_time(relpath, h, reader.tally if deep else None, site_file)
    if found is not None:
        report.scan_time, report.time_source = found
        if report.time_source == "gps" and not h.adjusted_gps_time:
            report.notes.append(
                "the header says GPS week time (global encoding bit 0 clear) but the times run past a week "
                "and match the file's date as adjusted standard GPS time; read as such"
            )
    if h.crs_wkt:
        report.crs_wkt, report.crs_source = h.crs_wkt, "file"
    elif site_file.crs:
        report.crs_wkt, report.crs_source = _wkt(site_file.crs), "site_file"
    unusable = []
    if report.scan_time is None:
        unusable.append(
            "no scan time: the points carry no absolute GPS time, no folder or file name holds a date "
            "(YYYYMMDD_HHMMSS, 2016-05-01, 20160501, 2016/05/01) and the header has no creation date; "
            f"put the file in a dated folder, or give its time in the site file: [times] \"{relpath}\" = \"2016-05-01T10:00:00Z\""
        )
    if report.crs_wkt is None:
        unusable.append(
            "no CRS in the file; give --crs EPSG:XXXX or [site] crs in the site file "
            "(--crs none if the scans are in a local frame)"
        )
    if (report.point_count or 0) == 0 and deep:
        unusable.append("no readable points")
    report.problems.extend(unusable)
    if unusable:
        report.status = "unusable"
    elif len(report.problems) > 0:
        report.status = "damaged"
    return report


def _inspect_grid(fs, path: str, report: FileReport, site_file: SiteFile) -> FileReport:
    from archive.sources.grids import probe_grid

    try:
        info = probe_grid(fs, path, report.relpath, site_file)
    except (SourceError, ValueError, OSError) as exc:
        report.status = "unusable"
        report.problems.append(_reason(exc, report.relpath))
        return report
    report.format = info.format
    report.product = info.product
    report.crs_wkt = info.crs_wkt
    report.crs_source = info.crs_source
    report.bounds = info.bounds
    report.scan_time = info.time
    report.time_source = "path" if info.time else None
    if report.crs_wkt is None:
        report.status = "unusable"
        report.problems.append("grid has no CRS; set crs in a site file [[grids.files]] rule or give --crs")
    return report


def _reason(exc: Exception, relpath: str) -> str:
    """An exception's message without the file name: the report row already names the file."""
    return str(exc).removeprefix(f"{relpath}: ")


def _wkt(crs: str) -> str:
    from pyproj import CRS

    if declares_no_crs(crs):
        return LOCAL_FRAME_WKT
    return CRS.from_user_input(crs).to_wkt()


def mark_duplicates(files: Iterable[FileReport]) -> None:
    """The first file (by path) is the original: later byte-identical files become duplicates, and
    later point files claiming the same station and scan time become unusable (one scan id, one scan)."""
    seen: dict[str, str] = {}
    scans: dict[tuple[str, datetime], str] = {}
    for f in files:
        if f.kind not in ("points", "grid") or not f.sha256:
            continue
        if f.sha256 in seen:
            f.status = "duplicate"
            f.duplicate_of = seen[f.sha256]
            f.problems.append(f"byte-identical to {seen[f.sha256]}; converted once from that file")
            continue
        seen[f.sha256] = f.relpath
        if f.kind == "points" and f.status in ("ok", "damaged") and f.scan_time is not None:
            key = (f.station, f.scan_time.replace(microsecond=0))
            if key in scans:
                f.status = "unusable"
                f.problems.append(
                    f"same station and scan time as {scans[key]} but different content; "
                    "remove one of them or give them distinct time stamps"
                )
            else:
                scans[key] = f.relpath


def survey(
    source: str,
    site_file: SiteFile | str | None = None,
    crs: str | None = None,
    *,
    storage_options: dict | None = None,
    deep: bool = True,
    progress: bool = False,
) -> SurveyResult:
    """Inventory a source (local path or fsspec URL). Always walks every file; never raises for bad ones."""
    if not isinstance(site_file, SiteFile):
        site_file = load_site_file(site_file, crs)
    else:
        site_file = site_file.with_crs(crs)
    fs, root = filesystem(source, storage_options)
    if not fs.exists(root):
        raise FileNotFoundError(f"source {source} does not exist")
    entries = walk_source(fs, root, site_file)
    files = []
    bar = progress_bar(progress, total=sum(e[2] for e in entries), unit="B", desc="survey")
    for path, relpath, size, mtime in entries:
        files.append(inspect_file(fs, path, relpath, size, site_file, deep=deep, mtime=mtime))
        bar.update(size)
    bar.close()
    mark_duplicates(files)
    return SurveyResult(source=str(source), files=files)


def progress_bar(enabled: bool, **kwargs):
    """One look for every long-running step's progress (tqdm, off when ``enabled`` is false)."""
    from tqdm.auto import tqdm

    return tqdm(disable=not enabled, unit_scale=True, leave=False, **kwargs)


__all__ = ["FileReport", "SurveyResult", "survey", "inspect_file", "walk_source", "station_of"]
