"""Migrate: turn a source archive into a shelf, scan by scan, resumably.

The coordinator (this module) decides the site-wide Hilbert grid and the station grids, runs
one task per scan (``convert_scan``: read → sort → Parquet, binning and footprint on the way),
and alone writes the ledger, the cubes' time steps and the catalog. A task only writes its own
Parquet file (temporary name, then rename), so tasks can run anywhere — in this process or on
dask workers — and a killed run re-run with the same arguments finishes the same shelf.
"""

from __future__ import annotations

import contextlib
import fnmatch
import json
import os
import uuid
from collections import Counter
from dataclasses import asdict, dataclass, field, replace
from datetime import datetime
from pathlib import Path

import numpy as np

from archive import layout
from archive.cluster import DEFAULT_MEMORY_PER_WORKER, DaskExecutor, SerialExecutor
from archive.crashpoints import crash_point
from archive.frames import is_local
from archive.grids import GridAccumulator, GridSpec, EpochGrid
from archive.grids.spec import MAX_CELLS, overlapping_groups
from archive.layout import ScanId
from archive.ledger import Ledger
from archive.points.hilbert import SiteGrid
from archive.points.write import row_group_rows, write_scan
from archive.sitefile import SiteFile, load_site_file
from archive.records import ScanRecord
from archive.sources import SourceError, open_points
from archive.storage import filesystem, join
from archive.survey import FileReport, grouped_notes, inspect_file, mark_duplicates, progress_bar, walk_source
from archive.timeutil import adjusted_gps_to_utc, utc_to_adjusted_gps

CHUNK_POINTS = 2_000_000
MEMORY_BUDGET = 1200 * 2**20  # a 20M-point LAS 1.4 scan sorts in memory; peak RSS stays under 1.5 GiB (benchmarks/migrate.py)
# names of temporary files and folders (the write path's temporary names, spill folders, cube
# copies being built): whatever of them a killed run left is removed at the start and end of a run
LEFTOVERS = ("*.part-*", "*.part", ".scanshelf-spill-*", "*.tmp-*", "*.partial")
WORKER_SORT_SHARE = 0.4  # of a dask worker's memory for the sort; the rest is Arrow buffers and Python
# bumped when inspection learns new facts (2: time sources, LAS scales, waveform, notes), so that
# the ledger's cached inspections of unchanged files are redone once
INSPECTION_VERSION = 2
FOOTPRINT_CELLS = 256  # the catalog outline is traced on at most this many cells a side


@dataclass(frozen=True)
class ScanTask:
    """Everything one worker needs to convert one scan; plain values so it pickles."""

    source: str
    storage_options: dict
    path: str
    report: FileReport
    scan_id: str
    shelf: str
    site_grid: dict
    grid_spec: dict | None  # None: converted, not gridded (grid_note says why)
    site_file: SiteFile
    salvage: bool
    chunk_points: int = CHUNK_POINTS
    memory_budget: int = MEMORY_BUDGET
    row_group_points: int | None = None  # None: from the scan's point count and footprint
    previews: bool = True
    grid_note: str | None = None


@dataclass
class ScanOutcome:
    relpath: str
    record: ScanRecord | None = None
    epoch: EpochGrid | None = None
    error: str | None = None
    damaged: bool = False


@dataclass
class MigrateResult:
    """What a migration did, file by file; the CLI prints it and picks the exit code."""

    shelf: str
    converted: list[str] = field(default_factory=list)  # scan ids converted in this run
    skipped_done: int = 0  # files already converted by an earlier run
    failed: list[tuple[str, str]] = field(default_factory=list)  # (relpath, reason)
    duplicates: list[tuple[str, str]] = field(default_factory=list)  # (relpath, original)
    partial: list[str] = field(default_factory=list)  # scan ids salvaged from damaged files
    grids: list[str] = field(default_factory=list)  # legacy grid stores written
    ignored: list[str] = field(default_factory=list)
    points: int = 0  # points converted in this run
    outside_grid: dict[str, int] = field(default_factory=dict)  # scan id -> points outside its station grid
    scans_total: int = 0
    dashboard: str | None = None  # dask dashboard of a cluster run
    retired: list[str] = field(default_factory=list)  # scans replaced because their source file changed
    ungridded: dict[str, str] = field(default_factory=dict)  # scan id -> why its points were not gridded
    notes: list[str] = field(default_factory=list)  # the survey's notes: renamed stations, waveform not carried

    @property
    def ok(self) -> bool:
        return not self.failed and not self.duplicates

    def summary(self) -> str:
        if not self.scans_total and self.failed:
            head = [f"no scan converted: {len(self.failed)} files failed, each with its reason below"]
        else:
            head = []
        lines = head + [
            f"shelf {self.shelf}: {self.scans_total} scans in all; this run converted {len(self.converted)} scans "
            f"({self.points:,} points), {self.skipped_done} files were already done",
        ]
        if self.partial:
            lines.append(f"salvaged (partial): {', '.join(self.partial)}")
        if self.grids:
            lines.append(f"legacy grids: {', '.join(self.grids)}")
        outside = {k: v for k, v in self.outside_grid.items() if v}
        if outside:
            lines.append(
                "points outside their station grid (kept in the points archive, not gridded): "
                + ", ".join(f"{k} {v}" for k, v in outside.items())
            )
        if self.notes:
            lines.append("notes:")
            lines += [f"  {n}" for n in self.notes]
        if self.ungridded:
            lines.append("converted, not gridded:")
            lines += [f"  {k}: {v}" for k, v in self.ungridded.items()]
        if self.duplicates:
            lines.append("duplicates (converted once from the original):")
            lines += [f"  {rel}  = {orig}" for rel, orig in self.duplicates]
        if self.failed:
            lines.append("not converted:")
            lines += [f"  {rel}: {why}" for rel, why in self.failed]
        if self.ignored:
            lines.append(f"ignored (not point or grid files): {len(self.ignored)}")
        return "\n".join(lines)


@dataclass(frozen=True)
class MigrateOptions:
    """How a migration runs, apart from what it reads and where it writes.

    One object from the command line (or ``watch``) down to the tasks, so the data flow shows
    which setting reaches which stage.
    """

    salvage: bool = False  # convert the readable points of damaged files, marked partial
    cell: float | None = None  # grid cell in metres; overrides the site file
    storage_options: dict | None = None  # fsspec options of the source
    progress: bool = False  # progress bars on stderr
    previews: bool = True  # a PNG preview per scan
    catalog: bool = True  # write the STAC catalog and the health page at the end
    chunk_points: int = CHUNK_POINTS  # points read at a time
    memory_budget: int = MEMORY_BUDGET  # bytes for one scan's sort before it spills to disk
    row_group_points: int | None = None  # None: from the scan's point count and footprint
    workers: int | None = None  # start a local dask cluster of this many workers
    scheduler: str | None = None  # or use a running dask scheduler at this address
    memory_per_worker: int | None = None  # bytes per dask worker


def migrate(
    source: str,
    shelf: str,
    site_file: SiteFile | str | None = None,
    crs: str | None = None,
    *,
    options: MigrateOptions | None = None,
    **settings,
) -> MigrateResult:
    """Convert every scan and grid of ``source`` into the local shelf folder ``shelf``.

    Re-running skips what the ledger records as done (same checksum) and finishes the rest;
    a source file whose checksum changed is converted again and replaces its scan.
    ``settings`` are fields of :class:`MigrateOptions` (``migrate(src, shelf, salvage=True)``),
    applied over ``options``. ``workers`` starts a local dask cluster, ``scheduler`` uses a running
    one (its workers must see ``shelf`` at the same path, e.g. on a shared file system); each
    worker then keeps its sort within ``memory_per_worker``.
    """
    options = replace(options or MigrateOptions(), **settings)
    if not isinstance(site_file, SiteFile):
        site_file = load_site_file(site_file, crs)
    else:
        site_file = site_file.with_crs(crs)
    if options.cell is not None:
        site_file = replace(site_file, grid_cell=float(options.cell))
    fs, root = filesystem(source, options.storage_options)
    if not fs.exists(root):
        raise FileNotFoundError(f"source {source} does not exist")
    shelf_path = Path(shelf)
    shelf_path.mkdir(parents=True, exist_ok=True)
    _remove_leftovers(shelf_path)
    result = MigrateResult(shelf=str(shelf_path))
    if options.workers or options.scheduler:
        executor = DaskExecutor(options.workers, options.scheduler,
                                options.memory_per_worker or DEFAULT_MEMORY_PER_WORKER)
        options = replace(options, memory_budget=min(options.memory_budget,
                                                      int(executor.memory_per_worker * WORKER_SORT_SHARE)))
        result.dashboard = executor.dashboard_link
        if options.progress and executor.dashboard_link:
            print(f"dask dashboard: {executor.dashboard_link}")
    else:
        executor = SerialExecutor()
    try:
        _run(source, fs, root, shelf_path, site_file, result, executor, options)
    finally:
        executor.close()
    _remove_leftovers(shelf_path)  # a worker killed mid-scan leaves its temporary file; the scan was redone
    return result


def _run(source, fs, root, shelf_path: Path, site_file: SiteFile, result: MigrateResult, executor,
         options: MigrateOptions) -> None:
    salvage, storage_options = options.salvage, options.storage_options
    with Ledger(shelf_path / layout.LEDGER) as ledger:
        reports = _survey(fs, root, site_file, ledger, executor, options.progress)
        _write_survey(shelf_path, source, reports)
        result.notes = grouped_notes(reports)
        crash_point("survey.written")
        usable = [r for r in reports if r.kind == "points" and (r.status == "ok" or (salvage and r.status == "damaged"))]
        site_grid = _site_grid(ledger, usable, site_file)
        specs = _station_grids(ledger, usable, site_file)
        tasks, done_ids = [], set()
        for report in reports:
            _classify_outcome(report, ledger, result, salvage)
        for report in usable:
            scan_id = str(ScanId(report.station, report.scan_time))
            entry = ledger.file(report.relpath)
            if entry and entry.sha256 == report.sha256 and entry.status in ("done", "partial"):
                result.skipped_done += 1
                done_ids.add(scan_id)
                continue
            grid_spec, grid_note = _grid_for(report, specs[report.station], site_file)
            tasks.append(
                ScanTask(
                    source=str(source), storage_options=storage_options or {}, path=join(root, report.relpath),
                    report=report, scan_id=scan_id, shelf=str(shelf_path), site_grid=site_grid.to_dict(),
                    grid_spec=grid_spec, site_file=site_file, salvage=salvage,
                    chunk_points=options.chunk_points, memory_budget=options.memory_budget,
                    row_group_points=options.row_group_points, previews=options.previews, grid_note=grid_note,
                )
            )
        bar = progress_bar(options.progress, total=sum(t.report.point_count or 0 for t in tasks), unit="pt", desc="migrate")
        for task, outcome in executor.run(convert_scan, tasks):
            if isinstance(outcome, BaseException):
                outcome = ScanOutcome(task.report.relpath, error=f"failed twice on the cluster: {outcome!r}")
            _record_outcome(outcome, task, ledger, result)
            bar.update(outcome.record.point_count if outcome.record else 0)
            bar.set_postfix_str(f"{len(result.converted)}/{len(tasks)} scans", refresh=False)
        bar.close()
        _ingest_grids(fs, root, reports, site_file, shelf_path, ledger, result, storage_options)
        checksums = ledger.scan_checksums()
        result.scans_total = len(checksums)
        if options.catalog and checksums:  # no scan converted yet: nothing to catalog; the summary says why
            _write_catalog(shelf_path, checksums, result, site_file, ledger)
            if checksums and _report_stale(shelf_path):
                from archive.report import write_index_html

                write_index_html(shelf_path)
                crash_point("report.written")


# --- survey and planning --------------------------------------------------------------------


def _survey(fs, root: str, site_file: SiteFile, ledger: Ledger, executor, progress: bool) -> list[FileReport]:
    """Inspect every file, reusing the ledger's cached inspection of unchanged files."""
    entries = walk_source(fs, root, site_file)
    reports: dict[str, FileReport] = {}
    todo = []
    for path, relpath, size, mtime in entries:
        cached = ledger.inspection(relpath, size, mtime)
        if cached is not None and json.loads(cached).get("inspection") == INSPECTION_VERSION:
            reports[relpath] = _report_from_json(cached)
        else:
            todo.append((path, relpath, size, mtime))
    bar = progress_bar(progress, total=sum(e[2] for e in todo), unit="B", desc="survey")
    for (fs_, path, relpath, size, site_file_, mtime), report in executor.run(
        _inspect_task, [(fs, p, r, s, site_file, m) for p, r, s, m in todo]
    ):
        if isinstance(report, BaseException):
            report = FileReport(relpath=relpath, size=size, kind="points", status="unusable", mtime=mtime,
                                problems=[f"inspection failed twice on the cluster: {report!r}"])
        reports[report.relpath] = report
        ledger.save_inspection(report.relpath, report.size, report.mtime, _report_to_json(report))
        bar.update(report.size)
    bar.close()
    ordered = [reports[e[1]] for e in entries]
    for r in ordered:  # duplicate marks depend on the whole walk, never on the cache
        if r.status == "duplicate":
            r.status, r.duplicate_of = "ok", None
            r.problems = [p for p in r.problems if not p.startswith("byte-identical")]
    mark_duplicates(ordered)
    return ordered


def _inspect_task(args) -> FileReport:
    fs, path, relpath, size, site_file, mtime = args
    return inspect_file(fs, path, relpath, size, site_file, deep=True, mtime=mtime)


def _report_to_json(report: FileReport) -> str:
    d = asdict(report) | {"inspection": INSPECTION_VERSION}
    d["scan_time"] = report.scan_time.isoformat() if report.scan_time else None
    return json.dumps(d)


def _report_from_json(text: str) -> FileReport:
    d = json.loads(text)
    d.pop("inspection", None)
    d["scan_time"] = datetime.fromisoformat(d["scan_time"]) if d["scan_time"] else None
    d["bounds"] = tuple(d["bounds"]) if d["bounds"] else None
    d["columns"] = tuple(d["columns"])
    return FileReport(**d)


def _write_survey(shelf: Path, source: str, reports: list[FileReport]) -> None:
    from archive.survey import SurveyResult

    SurveyResult(str(source), reports).write(str(shelf / layout.SURVEY))


def _site_grid(ledger: Ledger, usable: list[FileReport], site_file: SiteFile) -> SiteGrid:
    """The Hilbert grid is fixed by the first migration so later scans sort on the same curve."""
    stored = ledger.setting("site_grid")
    if stored is not None:
        return SiteGrid.from_dict(stored)
    boxes = [r.bounds for r in usable if r.bounds]
    if not boxes:
        return SiteGrid.from_bounds(0.0, 0.0, 1.0, 1.0)
    b = np.array(boxes)
    grid = SiteGrid.from_bounds(b[:, 0].min(), b[:, 1].min(), b[:, 3].max(), b[:, 4].max())
    ledger.set_setting("site_grid", grid.to_dict())
    return grid


def _station_grids(ledger: Ledger, usable: list[FileReport], site_file: SiteFile) -> dict[str, GridSpec | None]:
    """One fixed grid per station: the site file's extent, else its main group of overlapping scans
    plus a margin; None for a station whose grid would exceed MAX_CELLS (its points still convert).

    A folder may mix scans from different places or coordinate systems: the grid covers the group
    of overlapping scans in the station's commonest CRS with the most points; scans away from it
    are converted but not gridded (``_grid_for`` says why).
    """
    stored = ledger.setting("station_grids") or {}
    specs = {k: (GridSpec.from_dict(v) if v else None) for k, v in stored.items()}
    by_station: dict[str, list[FileReport]] = {}
    for r in usable:
        by_station.setdefault(r.station, []).append(r)
    for station, reports in sorted(by_station.items()):
        if station in specs:
            continue
        crs = Counter(r.crs_wkt for r in reports).most_common(1)[0][0]
        extent = site_file.grid_extent(station)
        if extent is None:
            mine = [r for r in reports if r.bounds and r.crs_wkt == crs]
            if not mine:
                specs[station] = None
                continue
            boxes = [(r.bounds[0], r.bounds[1], r.bounds[3], r.bounds[4]) for r in mine]
            groups = overlapping_groups(boxes, gap=2 * site_file.grid_margin)
            main = max(groups, key=lambda g: (sum(mine[i].point_count or 0 for i in g), -g[0]))
            b = np.array([boxes[i] for i in main])
            extent = (b[:, 0].min(), b[:, 1].min(), b[:, 2].max(), b[:, 3].max())
            margin = site_file.grid_margin
        else:
            margin = 0.0
        spec = GridSpec.from_bounds(station, extent, site_file.grid_cell, margin, crs)
        specs[station] = spec if spec.cells <= MAX_CELLS else None
    ledger.set_setting("station_grids", {k: (v.to_dict() if v else None) for k, v in specs.items()})
    return specs


def _grid_for(report: FileReport, spec: GridSpec | None, site_file: SiteFile) -> tuple[dict | None, str | None]:
    """The station grid this scan is binned into, or None and the reason it is not gridded."""
    if spec is None:
        return None, (
            f"not gridded: station {report.station}'s scans would need a grid beyond {MAX_CELLS:,} cells "
            f"at {site_file.grid_cell} m; set [grids] cell or [grids.extent] in the site file"
        )
    if report.crs_wkt != spec.crs_wkt:
        return None, f"not gridded: its CRS ({report.crs_name}) differs from the station grid's"
    if report.bounds and not spec.overlaps(report.bounds):
        return None, f"not gridded: it lies away from station {report.station}'s other scans and grid"
    return spec.to_dict(), None


def _classify_outcome(report: FileReport, ledger: Ledger, result: MigrateResult, salvage: bool) -> None:
    """Record files that will not be converted (duplicates, failures, non-data) in the ledger."""
    if report.kind == "grid":
        return
    common = dict(size=report.size, mtime=report.mtime, sha256=report.sha256, kind=report.kind, station=report.station)
    if report.status == "ignored":
        result.ignored.append(report.relpath)
        ledger.record_file(report.relpath, status="ignored", **common)
    elif report.status == "duplicate":
        result.duplicates.append((report.relpath, report.duplicate_of))
        ledger.record_file(report.relpath, status="duplicate", error=f"duplicate of {report.duplicate_of}", **common)
    elif report.status == "unusable" or (report.status == "damaged" and not salvage):
        why = "; ".join(report.problems)
        if report.status == "damaged":
            why += "; use --salvage to convert the readable points"
        result.failed.append((report.relpath, why))
        ledger.record_file(report.relpath, status="failed", error=why, **common)


# --- one scan ---------------------------------------------------------------------------------


def convert_scan(task: ScanTask) -> ScanOutcome:
    """Read, sort and write one scan; bin it onto its station grid on the way. Never raises."""
    report = task.report
    try:
        return _convert(task)
    except (SourceError, ValueError, OSError) as exc:
        return ScanOutcome(report.relpath, error=str(exc).removeprefix(f"{report.relpath}: "))


def _convert(task: ScanTask) -> ScanOutcome:
    from archive.catalog.footprint import outline

    report, site_file = task.report, task.site_file
    fs, _ = filesystem(task.source, task.storage_options)
    with fs.open(task.path, "rb") as fh:
        head = fh.read(4096)
    reader = open_points(fs, task.path, report.relpath, report.size, head, site_file)
    scan = ScanId.parse(task.scan_id)
    relative = layout.points_path(scan)
    final = Path(task.shelf) / relative
    final.parent.mkdir(parents=True, exist_ok=True)
    temp = final.with_name(f"{final.name}.part-{uuid.uuid4().hex[:8]}")
    spec = GridSpec.from_dict(task.grid_spec) if task.grid_spec else None
    binner = GridAccumulator(spec) if spec else None
    axes = reader.header.axes

    def feed(table) -> None:
        if binner is not None:
            binner.add(*(axes[a].column(table, a) for a in "xyz"))
        crash_point("points.row_group")

    metadata = {"scanshelf": _file_metadata(task, reader.header)}
    try:
        written = write_scan(
            reader.rows(task.chunk_points, salvage=task.salvage), str(temp), SiteGrid.from_dict(task.site_grid),
            metadata=metadata, row_group_size=task.row_group_points or row_group_rows(report.point_count, report.bounds), memory_budget=task.memory_budget,
            spill_dir=str(final.parent), on_sorted=feed,
        )
        crash_point("points.written")
        os.replace(temp, final)
        crash_point("points.renamed")
    finally:
        if temp.exists():
            temp.unlink()
    epoch = binner.finish() if binner is not None else None
    tally = reader.tally
    problems = tuple(dict.fromkeys([*report.problems, *tally.problems]))
    start = report.scan_time
    end = start
    first = None
    if tally.min_time is not None and tally.max_time is not None:
        if reader.header.adjusted_gps_time:
            first, end = adjusted_gps_to_utc(tally.min_time), adjusted_gps_to_utc(tally.max_time)
        else:
            end = start + (adjusted_gps_to_utc(tally.max_time) - adjusted_gps_to_utc(tally.min_time))
    preview = None
    if task.previews and epoch is not None and epoch.inside:
        preview = _write_preview(task, spec, epoch, scan)
    notes = [task.grid_note] if task.grid_note else []
    record = ScanRecord(
        scan_id=task.scan_id, station=scan.station, start=start, end=end, first_point_time=first,
        crs_wkt=report.crs_wkt, crs_code=report.crs_name if report.crs_name and ":" in report.crs_name else None,
        bbox=written.bbox, point_count=written.rows, points_href=relative, points_size=written.size,
        points_sha256=written.sha256, row_groups=written.row_groups,
        columns=written.columns,
        source_path=report.relpath, source_sha256=report.sha256, source_format=reader.header.format,
        partial=bool(tally.problems) or report.status == "damaged", problems=problems,
        scanner_origin=site_file.station_origin(scan.station),
        footprint=(outline(_coarse(epoch.point_count > 0, spec), _coarse_transform(spec), spec.crs_wkt)
                   if epoch is not None and epoch.inside and not is_local(spec.crs_wkt) else None),
        preview_href=preview, grid_href=layout.grid_path(scan.station) if epoch is not None else None,
        extra={"outside_grid": epoch.outside if epoch is not None else None, "point_format": reader.header.point_format,
               "version": reader.header.version, **({"notes": notes} if notes else {})},
        time_source=report.time_source,
    )
    return ScanOutcome(report.relpath, record=record, epoch=epoch, damaged=record.partial)


def _file_metadata(task: ScanTask, header) -> str:
    from pyproj import CRS

    report = task.report
    return json.dumps({
        "scan_id": task.scan_id,
        "station": report.station,
        "crs": CRS.from_wkt(report.crs_wkt).to_json_dict(),
        "axes": {a: enc.to_dict() for a, enc in header.axes.items()},
        "gps_time": _gps_time_meaning(report, header),
        "source": {
            "path": report.relpath, "sha256": report.sha256, "format": header.format,
            "version": header.version, "point_format": header.point_format,
        },
        "partial": task.salvage and report.status == "damaged",
    })


def _gps_time_meaning(report: FileReport, header) -> str:
    """What the gps_time column holds; for week time, the GPS week the scan's time placed it in."""
    if header.adjusted_gps_time or report.time_source == "gps":
        return "adjusted standard GPS time (GPS seconds - 1e9)"
    if report.time_source in ("gps_week", "gps_week_header"):
        week = int((utc_to_adjusted_gps(report.scan_time) + 1e9) // (7 * 86400))
        return f"GPS week seconds of GPS week {week} (week from the {'path' if report.time_source == 'gps_week' else 'header'} date)"
    return "GPS week seconds (week unknown)"


def _footprint_factor(spec: GridSpec) -> int:
    return max(1, -(-max(spec.nx, spec.ny) // FOOTPRINT_CELLS))


def _coarse(mask: np.ndarray, spec: GridSpec) -> np.ndarray:
    """Occupancy on a grid of at most FOOTPRINT_CELLS a side: outlines stay small and fast to trace."""
    f = _footprint_factor(spec)
    ny, nx = (mask.shape[0] + f - 1) // f * f, (mask.shape[1] + f - 1) // f * f
    padded = np.zeros((ny, nx), bool)
    padded[: mask.shape[0], : mask.shape[1]] = mask
    return padded.reshape(ny // f, f, nx // f, f).any(axis=(1, 3))


def _coarse_transform(spec: GridSpec):
    f = _footprint_factor(spec)
    t = spec.transform
    return type(t)(t.a * f, t.b, t.c, t.d, t.e * f, t.f)


def _write_preview(task: ScanTask, spec: GridSpec, epoch: EpochGrid, scan: ScanId) -> str | None:
    from archive.report.previews import preview_png

    relative = layout.preview_path(scan)
    final = Path(task.shelf) / relative
    final.parent.mkdir(parents=True, exist_ok=True)
    temp = final.with_name(f"{final.stem}.part-{uuid.uuid4().hex[:8]}.png")
    try:
        temp.write_bytes(preview_png(epoch, spec, title=task.scan_id))  # local: no fsspec round trip
        os.replace(temp, final)
        crash_point("preview.renamed")
    finally:
        if temp.exists():
            temp.unlink()
    return relative


def _record_outcome(outcome: ScanOutcome, task: ScanTask, ledger: Ledger, result: MigrateResult) -> None:
    report = task.report
    common = dict(size=report.size, mtime=report.mtime, sha256=report.sha256, kind="points", station=report.station)
    if outcome.error is not None:
        result.failed.append((report.relpath, outcome.error))
        ledger.record_file(report.relpath, status="failed", error=outcome.error, scan_id=task.scan_id, **common)
        return
    record = outcome.record
    previous = ledger.file(report.relpath)
    if previous and previous.scan_id and previous.scan_id != record.scan_id:
        _retire_scan(Path(task.shelf), ledger, previous.scan_id)
        result.retired.append(previous.scan_id)
    if outcome.epoch is not None:
        from archive.grids.cube import write_epoch  # zarr, xarray, pandas: only once a scan is gridded

        cube = Path(task.shelf) / layout.grid_path(record.station)
        _repair_cube(cube)
        write_epoch(str(cube), GridSpec.from_dict(task.grid_spec), record.start, record.scan_id, outcome.epoch)
        crash_point("grid.epoch")
    else:
        result.ungridded[record.scan_id] = task.grid_note or "not gridded"
    outputs = ((record.points_href,) + ((layout.grid_path(record.station),) if record.grid_href else ())
               + ((record.preview_href,) if record.preview_href else ()))
    ledger.record_file(
        report.relpath, status="partial" if record.partial else "done", scan_id=record.scan_id,
        outputs=outputs, scan=record, **common,
    )
    crash_point("ledger.committed")
    result.converted.append(record.scan_id)
    result.points += record.point_count
    if outcome.epoch is not None:
        result.outside_grid[record.scan_id] = outcome.epoch.outside
    if record.partial:
        result.partial.append(record.scan_id)


def _write_catalog(shelf: Path, checksums: dict[str, str], result: MigrateResult, site_file: SiteFile,
                   ledger: Ledger) -> None:
    """Whole catalog on the first run; afterwards only the new Items plus collections, index and root.

    ``checksums`` (scan id → points SHA-256 of every finished scan) finds what the catalog lacks
    without parsing every scan's record: a big shelf's update costs its new scans.
    """
    from archive.catalog import build_catalog, update_catalog

    have_catalog = (shelf / layout.CATALOG).exists() and (shelf / layout.SCANS_INDEX).exists()
    behind, gone = _catalog_lag(shelf, checksums) if have_catalog else (set(), set())
    changed = set(result.converted) | set(result.retired) | behind
    removed = sorted(set(result.retired) | gone)
    if have_catalog and not changed and not removed and not result.grids:
        return
    if have_catalog:
        update_catalog(str(shelf), ledger.scans(changed), removed_ids=removed, settings=site_file.catalog or None,
                       memo=ledger)
    else:
        build_catalog(str(shelf), ledger.scans(), settings=site_file.catalog, memo=ledger)


def _report_stale(shelf: Path) -> bool:
    """The health page is older than the items index (judged from the files, so that the re-run of
    a killed migration refreshes it as the whole run would have)."""
    report, index = shelf / layout.REPORT, shelf / layout.SCANS_INDEX
    return not report.exists() or (index.exists() and report.stat().st_mtime_ns < index.stat().st_mtime_ns)


def _catalog_lag(shelf: Path, checksums: dict[str, str]) -> tuple[set[str], set[str]]:
    """Scans the ledger holds but the index lacks (or holds with other points), and index rows the
    ledger no longer has: what a run killed after its ledger commits left uncatalogued."""
    from archive.catalog.index import points_checksums
    from archive.catalog.store import ShelfFiles, multihash_sha256

    listed = points_checksums(ShelfFiles(str(shelf)))
    behind = {scan_id for scan_id, sha in checksums.items() if listed.get(scan_id) != multihash_sha256(sha)}
    return behind, set(listed) - set(checksums)


def _repair_cube(cube: Path) -> None:
    """Undo an append a killed run left half done, so that it can be redone.

    An append rewrites the root metadata without its consolidated copy first, then resizes and
    writes the arrays one by one, then consolidates: the consolidated copy is present exactly
    when no append was cut short. Then the arrays along time are cut back to the shortest one
    (the step being written is not in the ledger, so the re-run writes it again).
    """
    import zarr

    root = cube / "zarr.json"
    if not root.exists():
        return
    try:
        if json.loads(root.read_text()).get("consolidated_metadata"):
            return
    except ValueError:
        raise ValueError(f"{root} is damaged; delete {cube} and run `scanshelf grid` to rebuild the cube") from None
    group = zarr.open_group(str(cube), mode="r+", zarr_format=3, use_consolidated=False)
    along = [a for _, a in group.arrays() if (a.metadata.dimension_names or (None,))[0] == "time"]
    if along:
        steps = min(a.shape[0] for a in along)
        for a in along:
            if a.shape[0] != steps:
                a.resize((steps, *a.shape[1:]))
    zarr.consolidate_metadata(str(cube))


def _retire_scan(shelf: Path, ledger: Ledger, scan_id: str) -> None:
    """A changed source file produced a scan under a new id: the old scan's files go."""
    scan = ScanId.parse(scan_id)
    for rel in (layout.points_path(scan), layout.preview_path(scan)):
        (shelf / rel).unlink(missing_ok=True)
    _blank_time_step(shelf / layout.grid_path(scan.station), scan_id)
    ledger.forget_scan(scan_id)


def _blank_time_step(cube: Path, scan_id: str) -> None:
    """An empty scan id marks a cube slot as unused; readers skip it and the next append reuses it."""
    import zarr

    if not cube.exists():
        return
    group = zarr.open_group(str(cube), mode="r+", zarr_format=3)
    ids = group["scan_id"][:]
    for i in np.flatnonzero(ids == scan_id):
        group["scan_id"][int(i)] = ""


def _ingest_grids(fs, root, reports, site_file, shelf: Path, ledger: Ledger, result: MigrateResult, storage_options) -> None:
    for report in reports:
        if report.kind != "grid":
            continue
        common = dict(size=report.size, mtime=report.mtime, sha256=report.sha256, kind="grid", station=report.station)
        entry = ledger.file(report.relpath)
        if entry and entry.sha256 == report.sha256 and entry.status == "done":
            result.skipped_done += 1
            continue
        if report.status == "duplicate":
            continue
        if report.status != "ok":
            why = "; ".join(report.problems)
            result.failed.append((report.relpath, why))
            ledger.record_file(report.relpath, status="failed", error=why, **common)
            continue
        from archive.grids import ingest_grid

        rule = site_file.grid_rule(report.relpath)
        try:
            ingested = ingest_grid(
                join(root, report.relpath), str(shelf), report.station,
                product=(rule.product if rule else None) or report.product,
                crs=(rule.crs if rule else None) or site_file.crs, time=report.scan_time,
                storage_options=storage_options,
            )
        except (SourceError, ValueError, OSError) as exc:
            why = str(exc)
            result.failed.append((report.relpath, why))
            ledger.record_file(report.relpath, status="failed", error=why, **common)
            continue
        if ingested.dest not in result.grids:
            result.grids.append(ingested.dest)
        ledger.record_file(report.relpath, status="done", outputs=(ingested.dest,), **common)


def _remove_leftovers(shelf: Path) -> None:
    """Temporary files and spill folders of a killed run are never part of the shelf.

    One walk with name tests (recursive globs over a shelf of thousands of files cost seconds).
    """
    import shutil

    for folder, dirs, files in os.walk(shelf):
        doomed = {n for n in (*dirs, *files) if any(fnmatch.fnmatchcase(n, p) for p in LEFTOVERS)}
        dirs[:] = [d for d in dirs if d not in doomed]  # not walked into: removed whole below
        for name in doomed:
            path = os.path.join(folder, name)
            if os.path.isdir(path) and not os.path.islink(path):
                shutil.rmtree(path, ignore_errors=True)
            else:
                with contextlib.suppress(FileNotFoundError):
                    os.unlink(path)
