"""Rebuild station cubes from the Parquet points already on a shelf (``scanshelf grid``).

Useful after changing the cell size, after a migration that skipped gridding, or to check a
cube against its points. Each station's cube is rebuilt under a temporary name and swapped in
whole, so a failed run leaves the old cube as it was.
"""

from __future__ import annotations

import json
import uuid
from collections import defaultdict
from dataclasses import dataclass
from pathlib import PurePosixPath

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq
from pyproj import CRS

from archive.grids.binning import GridAccumulator
from archive.grids.cube import read_spec, write_epoch
from archive.grids.series import write_series
from archive.grids.spec import GridSpec
from archive.layout import ScanId, check_station, grid_path
from archive.storage import filesystem


@dataclass(frozen=True)
class StationGridResult:
    station: str
    cube: str  # shelf-relative path
    spec: GridSpec
    scans: int
    points: int  # binned
    outside: int  # outside the grid (still in the points archive)


def _points_files(fs, root: str, station: str | None) -> dict[str, list[str]]:
    pattern = f"{root}/points/station={station or '*'}/year=*/*.parquet"
    by_station: dict[str, list[str]] = defaultdict(list)
    for path in sorted(fs.glob(pattern)):
        st = PurePosixPath(path).parent.parent.name.removeprefix("station=")
        by_station[st].append(path)
    return by_station


def _file_facts(fs, path: str) -> tuple[tuple[float, float, float, float], str]:
    """Bounds from row-group statistics (no data read) and the CRS WKT from the file metadata."""
    with fs.open(path, "rb") as f:
        md = pq.ParquetFile(f).metadata
    names = [md.schema.column(i).name for i in range(md.num_columns)]
    ix, iy = names.index("x"), names.index("y")
    lo = [np.inf, np.inf]
    hi = [-np.inf, -np.inf]
    for g in range(md.num_row_groups):
        for k, i in enumerate((ix, iy)):
            st = md.row_group(g).column(i).statistics
            if st is None or not st.has_min_max:
                raise ValueError(f"{path}: no min/max statistics for {names[i]}; re-migrate the scan")
            lo[k] = min(lo[k], float(st.min))
            hi[k] = max(hi[k], float(st.max))
    meta = json.loads((md.metadata or {}).get(b"scanshelf", b"{}"))
    crs = meta.get("crs")
    crs_wkt = CRS.from_user_input(crs).to_wkt() if crs else ""
    return (lo[0], lo[1], hi[0], hi[1]), crs_wkt


def _bin_file(fs, path: str, spec: GridSpec):
    """Bin one points file, its coordinates as the source's reader computed them (the file's
    ``axes`` metadata), as migrate binned them: a cast of the decimal can differ from a LAS
    reader's X * scale + offset by one float step and move a point on a cell edge."""
    from archive.query.points import axes_of

    acc = GridAccumulator(spec)
    with fs.open(path, "rb") as f:
        pf = pq.ParquetFile(f)
        axes = axes_of(pf.metadata)
        for g in range(pf.num_row_groups):
            t = pf.read_row_group(g, columns=["x", "y", "z"])
            acc.add(*(axes[c].column(t, c) if c in axes else pc.cast(t[c], pa.float64()).to_numpy() for c in "xyz"))
    return acc.finish()


def grid_shelf(
    shelf: str,
    cell: float | None = None,
    station: str | None = None,
    margin: float = 10.0,
    series: bool = True,
    storage_options: dict | None = None,
) -> list[StationGridResult]:
    """Re-grid every scan (of one ``station``, or all) from the shelf's points into its cube.

    The grid is the existing cube's (same origin, so epochs stay comparable) unless ``cell``
    asks for another cell size or there is no cube yet; then it is derived from the points'
    bounds plus ``margin``. ``series`` also rebuilds the time-series copy.
    """
    if station is not None:
        check_station(station)
    fs, root = filesystem(shelf, storage_options)
    root = root.rstrip("/")
    files = _points_files(fs, root, station)
    if not files:
        raise FileNotFoundError(f"no points under {shelf}/points/" + (f"station={station}/" if station else "")
                                + "; migrate a source into the shelf first")
    results = []
    for st, paths in sorted(files.items()):
        cube_rel = grid_path(st)
        cube_url = f"{shelf.rstrip('/')}/{cube_rel}"
        spec = read_spec(cube_url, storage_options)
        if spec is None or (cell is not None and cell != spec.cell):
            facts = [_file_facts(fs, p) for p in paths]
            b = np.array([f[0] for f in facts])
            bounds = (b[:, 0].min(), b[:, 1].min(), b[:, 2].max(), b[:, 3].max())
            spec = GridSpec.from_bounds(st, bounds, cell or (spec.cell if spec else 1.0), margin, facts[0][1])
        suffix = f".tmp-{uuid.uuid4().hex[:8]}"
        tmp_url = cube_url + suffix
        points = outside = 0
        for p in paths:
            scan = ScanId.parse(PurePosixPath(p).stem)
            epoch = _bin_file(fs, p, spec)
            write_epoch(tmp_url, spec, scan.time, str(scan), epoch, storage_options)
            points += epoch.inside
            outside += epoch.outside
        if series:
            write_series(tmp_url, storage_options)
        cube_path = f"{root}/{cube_rel}"
        if fs.exists(cube_path):
            fs.rm(cube_path, recursive=True)
        fs.mv(cube_path + suffix, cube_path, recursive=True)
        results.append(StationGridResult(st, cube_rel, spec, len(paths), points, outside))
    return results
