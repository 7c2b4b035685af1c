"""Station grids: elevation cubes binned from scans, change maps and ingested legacy grids."""

from archive.grids.binning import EpochGrid, GridAccumulator, bin_points
from archive.grids.change import ChangeResult, elevation_change
from archive.grids.cube import open_cube, read_spec, write_epoch
from archive.grids.series import write_series
from archive.grids.ingest import GridCrsMissing, IngestedGrid, ingest_grid
from archive.grids.regrid import StationGridResult, grid_shelf
from archive.grids.spec import GridSpec

__all__ = [
    "ChangeResult", "EpochGrid", "GridAccumulator", "GridCrsMissing", "GridSpec", "IngestedGrid",
    "StationGridResult", "bin_points", "elevation_change", "grid_shelf", "ingest_grid", "open_cube",
    "read_spec", "write_epoch", "write_series",
]
