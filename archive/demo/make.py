"""Build the demo: a messy legacy archive of an invented glacier site, and its answer key.

``make_demo`` plans every scan (station, time, format, fault) from the seed alone, writes the
point files (in parallel processes when asked; each file depends only on its own plan), then
the grid products, the non-data files, the site file and ``demo-truth.json``.
"""

from __future__ import annotations

import hashlib
import os
import shutil
from concurrent.futures import ProcessPoolExecutor
from dataclasses import dataclass, replace
from datetime import datetime, timedelta, timezone
from pathlib import Path

import numpy as np

from archive.demo import faults, grids, scanner, site
from archive.demo.truth import SCHEMA, DemoTruth
from archive.demo.writers import AsciiSpec, LasSpec, PointStats, atomic, write_ascii, write_las

START = datetime(2026, 9, 27, tzinfo=timezone.utc)
SWITCH = datetime(2026, 10, 1, tzinfo=timezone.utc)
# Common practice of the trade for fixed glacier scanners: every 6 h in summer, daily in
# winter (less daylight and power). The daily scan runs at noon UTC.
SUMMER_STEP = timedelta(hours=6)
WINTER_HOUR = 12
OFFSET = (512_000.0, 7_713_000.0, 0.0)
EXTRA_BYTES = (("reflectance", "float32", "echo reflectance (dB)"), ("deviation", "uint16", "pulse shape deviation"))
LAS_COLUMNS = ("X", "Y", "Z", "intensity", "return_number", "number_of_returns", "classification",
               "point_source_id", "gps_time")
CSV = AsciiSpec(("X", "Y", "Z", "Intensity", "Time"), ",")
TXT = AsciiSpec(("x", "y", "z", "intensity", "gps_time"), " ")


@dataclass(frozen=True)
class ScanPlan:
    """One point file to write: everything needed, so a worker process can do it alone."""

    station: scanner.Station
    index: int
    time: float  # POSIX seconds (UTC) of the first pulse, a whole second
    path: str
    format: str  # "las" | "laz" | "ascii"
    spec: LasSpec | AsciiSpec
    n_points: int
    seed: tuple[int, ...]
    stamp: str  # stamp style in the name
    fault: str | None = None  # "truncated" | "count_mismatch" | "bad_rows" | "no_crs"


def _times(start: datetime, switch: datetime, end: datetime) -> list[datetime]:
    out, t = [], start
    while t < min(switch, end):
        out.append(t)
        t += SUMMER_STEP
    t = max(switch, start).replace(hour=WINTER_HOUR, minute=0, second=0)
    while t < end:
        out.append(t)
        t += timedelta(days=1)
    return out


def _iso(posix: float) -> str:
    return datetime.fromtimestamp(posix, timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ")


def plan_scans(seed: int, n_stations: int, weeks: int, points_per_scan: int, total_points: int | None,
               with_faults: bool, start: datetime, switch: datetime) -> list[ScanPlan]:
    """Decide every scan file from the parameters alone (no I/O)."""
    if not 1 <= n_stations <= len(scanner.STATIONS):
        raise ValueError(f"stations must be 1 or 2, not {n_stations}")
    if weeks < 1:
        raise ValueError(f"weeks must be at least 1, not {weeks}")
    times = _times(start, switch, start + timedelta(weeks=weeks))
    jitter = np.random.default_rng((seed, 0)).integers(2, 60, size=(n_stations, len(times)))
    n_scans = n_stations * len(times)
    counts = np.full(n_scans, points_per_scan, np.int64)
    if total_points is not None:
        counts[:] = total_points // n_scans
        counts[: total_points % n_scans] += 1
    plans: list[ScanPlan] = []
    for s, station in enumerate(scanner.STATIONS[:n_stations]):
        for i, t in enumerate(times):
            when = t + timedelta(seconds=station.delay + int(jitter[s, i]))
            n = int(counts[s * len(times) + i])
            plans.append(_plan_one(station, i, when, n, (seed, station.number, i)))
    return _plant(plans) if with_faults else plans


def _plan_one(station: scanner.Station, i: int, when: datetime, n: int, seed: tuple[int, ...]) -> ScanPlan:
    stamp = f"{when:%Y%m%d_%H%M%S}"
    t = when.timestamp()
    if station.id == "north":  # year/month folders, LAS 1.4 with GPS time, every third one LAZ
        fmt = 7 if i % 3 == 1 else 6
        ext = "laz" if fmt == 7 else ("LAS" if i % 6 == 2 else "las")
        spec = LasSpec("1.4", fmt, fmt == 7, site.SITE_CRS, True, 0.001, OFFSET, EXTRA_BYTES, "QG-TLS north")
        return ScanPlan(station, i, t, f"north/{when:%Y}/{when:%m}/N_{stamp}.{ext}", ext.lower(), spec, n, seed,
                        "YYYYMMDD_HHMMSS")
    if i % 5 == 2:  # ASCII exports in a flat folder with spaces in the names
        if i % 2 == 0:
            return ScanPlan(station, i, t, f"south/exports/South export {when:%Y%m%dT%H%M%S}.csv", "ascii", CSV,
                            n, seed, "YYYYMMDDTHHMMSS")
        return ScanPlan(station, i, t, f"south/exports/scan {stamp} xyz.txt", "ascii", TXT, n, seed,
                        "YYYYMMDD_HHMMSS")
    fmt = 3 if i % 4 == 3 else 1  # LAS 1.2, GPS week time: the name carries the time
    ext = "laz" if fmt == 3 else "LAS"
    spec = LasSpec("1.2", fmt, fmt == 3, site.SITE_CRS, False, 0.01, OFFSET, (), "QG-TLS south")
    return ScanPlan(station, i, t, f"south/raw/S_{stamp}.{ext}", ext.lower(), spec, n, seed, "YYYYMMDD_HHMMSS")


def _plant(plans: list[ScanPlan]) -> list[ScanPlan]:
    """Mark the scans that receive a fault: the first suitable one after a few healthy scans."""
    wanted = {
        "truncated": lambda p: p.station.id == "north" and p.format == "las" and p.index >= 3,
        "no_crs": lambda p: p.station.id == "north" and p.format == "las" and p.index >= 7,
        "count_mismatch": lambda p: p.station.id == "south" and p.format == "las" and p.index >= 3,
        "bad_rows": lambda p: p.format == "ascii",
    }
    out = list(plans)
    for kind, fits in wanted.items():
        for k, p in enumerate(out):
            if p.fault is None and fits(p):
                spec = replace(p.spec, crs=None) if kind == "no_crs" else p.spec
                out[k] = replace(p, fault=kind, spec=spec)
                break
    return out


def sha256(path: Path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as f:
        for block in iter(lambda: f.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


def write_scan(source: str, plan: ScanPlan) -> dict:
    """Write one point file (and plant its fault); return its truth record."""
    path = Path(source) / plan.path
    chunks = scanner.sweep(plan.station, plan.time, plan.n_points, plan.seed)
    keep = plan.n_points * 2 // 3 if plan.fault == "truncated" else None
    stats = PointStats(limit=keep)
    fault = None
    if isinstance(plan.spec, AsciiSpec):
        spoiler = faults.AsciiSpoiler(plan.n_points, plan.spec.delimiter) if plan.fault == "bad_rows" else None
        write_ascii(path, chunks, plan.spec, stats, spoiler)
        fault = spoiler.truth() if spoiler else None
    else:
        write_las(path, chunks, plan.spec, stats)
        if plan.fault == "truncated":
            fault = faults.truncate_las(path, keep)
        elif plan.fault == "count_mismatch":
            fault = faults.overstate_count(path, extra=max(1, plan.n_points // 10))
        elif plan.fault == "no_crs":
            fault = {"kind": "no_crs", "expect": "no CRS record in the file; the site file's [site] crs "
                     "gives it", "recoverable_points": plan.n_points}
    las = isinstance(plan.spec, LasSpec)
    adjusted = las and plan.spec.adjusted_time
    crs = plan.spec.crs if las else None
    needs = []
    if crs is None:
        needs.append("crs")
    if not adjusted and plan.stamp != "YYYYMMDD_HHMMSS":
        needs.append("time")
    if fault is not None:
        fault = {"kind": fault.pop("kind"), "expect": fault.pop("expect"),
                 "recoverable_points": fault.pop("recoverable_points"), "details": fault}
    header_count = None
    if las:
        header_count = fault["details"]["header_point_count"] if fault and plan.fault != "no_crs" else plan.n_points
    first_gps = scanner.utc_to_gps(plan.time)
    end = stats.last_gps - scanner.GPS_MINUS_UTC + scanner.GPS_EPOCH_POSIX
    return {
        "path": plan.path,
        "format": plan.format,
        "station": plan.station.id,
        "scan_id": f"{plan.station.id}-{datetime.fromtimestamp(plan.time, timezone.utc):%Y%m%dT%H%M%SZ}",
        "scan_time": _iso(plan.time),
        "end_time": _iso(np.floor(end)),
        "time_source": "gps_time" if adjusted else "file_name",
        "time_stamp": plan.stamp,
        "gps_time_type": "adjusted_standard" if adjusted else "week_seconds",
        "las_version": plan.spec.version if las else None,
        "point_format": plan.spec.point_format if las else None,
        "compressed": plan.format == "laz",
        "crs": crs,
        "crs_source": None if crs is None else ("wkt_vlr" if plan.spec.version == "1.4" else "geotiff_keys"),
        "columns": list(LAS_COLUMNS + (("red", "green", "blue") if las and plan.spec.point_format in (3, 7) else ())
                        + tuple(n for n, _, _ in plan.spec.extra)) if las else list(plan.spec.names),
        "extra_bytes": {n: t for n, t, _ in plan.spec.extra} if las else {},
        "scale": [plan.spec.scale] * 3 if las else None,
        "offset": list(plan.spec.offset) if las else None,
        "point_count": plan.n_points,
        "header_point_count": header_count,
        "recoverable_points": fault["recoverable_points"] if fault else plan.n_points,
        "bbox": stats.bbox,
        "tide_m": round(float(site.tide(plan.time)), 4),
        "fault": fault,
        "needs_site_file": needs,
        "sha256": sha256(path),
        "size": path.stat().st_size,
        "_first_gps_ok": bool(stats.first_gps == first_gps or plan.fault == "bad_rows"),
    }


def _write_all(source: Path, plans: list[ScanPlan], workers: int) -> list[dict]:
    if workers <= 1:
        return [write_scan(str(source), p) for p in plans]
    with ProcessPoolExecutor(max_workers=workers) as pool:
        return list(pool.map(write_scan, [str(source)] * len(plans), plans, chunksize=2))


README = """Quillmere Glacier front - terrestrial laser scanning archive (FICTIONAL DEMO DATA)
====================================================================================
Two fixed scanners watch the calving front from the inlet's valley walls:
  north/  LAS 1.4 (GPS time, adjusted standard), sorted in year/month folders
  south/  LAS 1.2 (GPS week time; the time is in the file name) and ASCII exports
Coordinates: WGS 84 / UTM zone 33N, metres. ASCII exports have no CRS of their own.
Scanning every 6 h in summer and once a day (12 UTC) in winter.
products/ folders hold DEMs and velocity grids made with old tools; one grid lost its CRS.
Invented site and data for software testing; not for hazard assessment of any real place.
"""

SITE_FILE = """# Site file for the scanshelf demo source (fictional site). The LAS/LAZ files need none of it;
# it gives the CRS of the ASCII exports, the LAS file without a CRS record and the grid that
# lost its CRS, and accepts both stamp styles (YYYYMMDD_HHMMSS and YYYYMMDDTHHMMSS).
version = 1

[site]
crs = "{crs}"
timezone = "UTC"

[paths]
station = '^(?P<station>[^/]+)/'
time = '(?P<time>\\d{{8}}[_T]\\d{{6}})'
include = ["**/*"]
exclude = ["**/.*", "**/Thumbs.db", "README.txt", "**/README.txt"]
{stations}
[ascii]
delimiter = "auto"
columns = ["x", "y", "z", "intensity", "gps_time"]
comment = "#"

[attributes]
rename = {{ "X" = "x", "Y" = "y", "Z" = "z", "Intensity" = "intensity", "Time" = "gps_time" }}

[grids]
cell = 10.0                 # metres: 20k points per scan over ~2 km need coarse cells to overlap between epochs
margin = 10.0

[[grids.files]]
pattern = '(?i)strain'
product = "strain_rate"
crs = "{crs}"

[[grids.files]]
pattern = '(?i)(displacement|velocity)'
product = "displacement"

[catalog]
license = "CC-BY-4.0"
title = "Quillmere Glacier front scans (fictional demo data)"
[[catalog.providers]]
name = "Quillmere Field Lab (fictional)"
roles = ["producer", "host"]
url = "https://example.org"
"""


def _site_file(stations: list[scanner.Station]) -> str:
    blocks = "".join(
        f'\n[stations.{s.id}]\nid = "{s.id}"\norigin = [{s.origin[0]}, {s.origin[1]}, {s.origin[2]}]\n'
        for s in stations
    )
    return SITE_FILE.format(crs=site.SITE_CRS, stations=blocks)


def _thumbs(seed: int) -> bytes:
    """A stand-in Windows thumbnail cache: OLE magic and noise, the way such files turn up."""
    magic = bytes.fromhex("d0cf11e0a1b11ae1")
    return magic + np.random.default_rng((seed, 99)).integers(0, 256, 4088, dtype=np.uint8).tobytes()


def make_demo(
    dest: str | os.PathLike,
    *,
    seed: int = 20261202,
    points_per_scan: int = 20_000,
    total_points: int | None = None,
    weeks: int = 4,
    stations: int = 2,
    faults: bool = True,
    start: datetime = START,
    switch: datetime = SWITCH,
    workers: int | None = None,
    overwrite: bool = False,
) -> DemoTruth:
    """Write ``dest/source/`` (a messy legacy archive), ``dest/site.toml`` and ``dest/demo-truth.json``.

    Same seed and parameters give byte-identical files. ``total_points`` (split evenly over
    all scans) overrides ``points_per_scan`` for benchmark-sized archives; files are written in
    chunks, so memory stays bounded whatever the size. ``workers`` processes write scans in
    parallel (default: up to 2). With one station the south-only faults (count mismatch, bad
    ASCII rows) are left out. The demo is written to a local folder (laspy, GDAL and HDF5 write
    local files); copy it elsewhere with fsspec if needed.
    """
    dest = Path(dest)
    source = dest / "source"
    if source.exists() and any(source.iterdir()):
        if not overwrite:
            raise FileExistsError(f"{source} already holds files; pass overwrite=True (--overwrite) to replace them")
        shutil.rmtree(source)
        for stale in ("site.toml", "demo-truth.json"):
            (dest / stale).unlink(missing_ok=True)
    source.mkdir(parents=True, exist_ok=True)
    plans = plan_scans(seed, stations, weeks, points_per_scan, total_points, faults, start, switch)
    workers = min(2, os.cpu_count() or 1) if workers is None else workers
    records = _write_all(source, plans, workers)
    if not all(r.pop("_first_gps_ok") for r in records):
        raise RuntimeError("demo generator bug: first point time differs from the planned scan time")
    if faults:
        records.append(_duplicate(source, records))
    used = scanner.STATIONS[:stations]
    times: dict[str, list[float]] = {}
    for p in plans:
        times.setdefault(p.station.id, []).append(p.time)
    grid_records = grids.write_products(source, times)
    for g in grid_records:
        g["sha256"], g["size"] = sha256(source / g["path"]), (source / g["path"]).stat().st_size
    others = []
    for rel, data, note in (
        ("README.txt", README.encode(), "lab notes, not data"),
        ("south/exports/Thumbs.db", _thumbs(seed), "Windows thumbnail cache, not data"),
    ):
        if rel.startswith("south") and stations < 2:
            continue
        with atomic(source / rel) as tmp:
            tmp.write_bytes(data)
        others.append({"path": rel, "note": note, "sha256": sha256(source / rel), "size": len(data)})
    needs_site_file = any(r["needs_site_file"] for r in records) or any(g["needs_site_file"] for g in grid_records)
    site_file = None
    if needs_site_file:
        with atomic(dest / "site.toml") as tmp:
            tmp.write_text(_site_file(list(used)))
        site_file = "site.toml"
    records.sort(key=lambda r: r["path"])
    unique = [r for r in records if not (r["fault"] and r["fault"]["kind"] == "duplicate")]
    truth = DemoTruth.from_dict({
        "schema": SCHEMA,
        "params": {"seed": seed, "points_per_scan": points_per_scan, "total_points": total_points, "weeks": weeks,
                   "stations": stations, "faults": faults, "start": start.isoformat(), "switch": switch.isoformat()},
        "site": _site_info(),
        "stations": [
            {"id": s.id, "folder": s.id, "origin": list(s.origin), "point_source_id": s.number,
             "azimuth": list(s.azimuth), "elevation": list(s.elevation), "scan_duration_s": s.duration}
            for s in used
        ],
        "site_file": site_file,
        "point_files": records,
        "grid_files": sorted(grid_records, key=lambda g: g["path"]),
        "other_files": others,
        "totals": {
            "point_files": len(records),
            "scans": len({r["scan_id"] for r in records}),
            "points": int(sum(r["point_count"] for r in unique)),
            "recoverable_points": int(sum(r["recoverable_points"] for r in unique)),
            "grid_files": len(grid_records),
            "other_files": len(others),
            "bytes": int(sum(r["size"] for r in records) + sum(g["size"] for g in grid_records)),
        },
    })
    truth.save(dest / "demo-truth.json")
    return truth


def _duplicate(source: Path, records: list[dict]) -> dict:
    """Copy a healthy north LAS scan to a backup folder under another name."""
    original = next(r for r in records if r["station"] == "north" and r["format"] == "las" and not r["fault"])
    copy = f"north/backup/scan copy {original['scan_time'][:10]}.las"
    faults.duplicate(source / original["path"], source / copy)
    record = dict(original, path=copy)
    record["fault"] = {
        "kind": "duplicate",
        "expect": f"byte-identical to {original['path']}: the same scan, to be migrated once",
        "recoverable_points": original["point_count"],
        "details": {"duplicate_of": original["path"]},
    }
    return record


def _site_info() -> dict:
    return {
        "name": site.SITE_NAME,
        "crs": site.SITE_CRS,
        "origin": list(site.SITE_ORIGIN),
        "frame": "local u = easting - origin[0] (downglacier), v = northing - origin[1]",
        "reference_time": site.REFERENCE_TIME.isoformat(),
        "tide": {"amplitude_m": site.TIDE_AMPLITUDE, "range_m": 2 * site.TIDE_AMPLITUDE,
                 "period_hours": site.TIDE_PERIOD_HOURS, "high_water": site.TIDE_HIGH_WATER.isoformat(),
                 "flexure_length_m": site.TIDE_FLOAT_LENGTH},
        "flow": {"speed_at_front_m_per_day": site.FLOW_AT_FRONT, "decay_length_m": site.FLOW_DECAY,
                 "direction": "east"},
        "thinning_m_per_day": site.THINNING,
        "front_height_m": site.FRONT_HEIGHT,
        "glacier_half_width_m": site.HALF_WIDTH,
        "gps_minus_utc_s": scanner.GPS_MINUS_UTC,
        "schedule": {"summer_step_hours": 6, "winter_daily_at_utc_hour": WINTER_HOUR},
    }
