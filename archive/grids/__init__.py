"""Station grids: elevation cubes binned from scans, change maps and ingested legacy grids.

The names below are imported on first use (archive/lazy.py): migrate needs the binning and the
spec, not the xarray, dask and rasterio behind change, series and ingest.
"""

from __future__ import annotations

from typing import TYPE_CHECKING

from archive.lazy import exports

if TYPE_CHECKING:
    from archive.grids.binning import EpochGrid, GridAccumulator, bin_points
    from archive.grids.change import ChangeResult, elevation_change
    from archive.grids.cube import open_cube, read_spec, write_epoch
    from archive.grids.ingest import GridCrsMissing, IngestedGrid, ingest_grid
    from archive.grids.regrid import StationGridResult, grid_shelf
    from archive.grids.series import write_series
    from archive.grids.spec import GridSpec

_HOMES = {
    "EpochGrid": "archive.grids.binning", "GridAccumulator": "archive.grids.binning",
    "bin_points": "archive.grids.binning",
    "ChangeResult": "archive.grids.change", "elevation_change": "archive.grids.change",
    "open_cube": "archive.grids.cube", "read_spec": "archive.grids.cube", "write_epoch": "archive.grids.cube",
    "write_series": "archive.grids.series",
    "GridCrsMissing": "archive.grids.ingest", "IngestedGrid": "archive.grids.ingest",
    "ingest_grid": "archive.grids.ingest",
    "StationGridResult": "archive.grids.regrid", "grid_shelf": "archive.grids.regrid",
    "GridSpec": "archive.grids.spec",
}

__all__ = sorted(_HOMES)

__getattr__, __dir__ = exports(__name__, _HOMES)
