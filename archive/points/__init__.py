"""Points of one scan: exact-decimal coordinates, Hilbert keys, bounded-memory sort, Parquet writing."""

from .coords import AxisEncoding, decimal_from_units, units_of
from .hilbert import SiteGrid, hilbert_index
from .sort import sorted_row_groups
from .write import Encoding, WrittenScan, write_scan

__all__ = [
    "AxisEncoding",
    "Encoding",
    "SiteGrid",
    "WrittenScan",
    "decimal_from_units",
    "hilbert_index",
    "sorted_row_groups",
    "units_of",
    "write_scan",
]
