"""Find and read scans from a shelf at any URL, fetching only what a query needs."""

from archive.query.iostats import IOStats
from archive.query.shelf import Scan, Scans, Shelf, open_shelf

__all__ = ["IOStats", "Scan", "Scans", "Shelf", "open_shelf"]
