"""Station grids: elevation cubes binned from scans, change maps and ingested legacy grids."""

from archive.grids.binning import EpochGrid, GridAccumulator, bin_points
from archive.grids.cube import open_cube, read_spec, write_epoch, write_series
from archive.grids.spec import GridSpec

__all__ = [
    "EpochGrid", "GridAccumulator", "GridSpec", "bin_points", "open_cube", "read_spec",
    "write_epoch", "write_series",
]
