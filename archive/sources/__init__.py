"""Readers for what a source holds: LAS/LAZ, ASCII point exports and grid files.

``classify`` decides from a file's name and first bytes what it is; ``open_points`` returns the
reader for a point file. Nothing else in scanshelf looks at extensions or magic numbers.
"""

from __future__ import annotations

import re
from pathlib import PurePosixPath

from archive.sources.ascii import AsciiReader
from archive.sources.base import DamagedSource, PointReader, ReadTally, SourceError, SourceHeader, scan_time_of
from archive.sources.las import LasReader, looks_like_las

POINT_TEXT_SUFFIXES = {".csv", ".txt", ".xyz", ".pts", ".asc", ".tsv"}
GRID_SUFFIXES = {".tif", ".tiff", ".nc", ".nc4", ".asc", ".grd"}
SIDECAR_SUFFIXES = {".prj", ".aux.xml", ".tfw", ".ovr", ".wdp"}  # .wdp: LAS waveform data packets

__all__ = [
    "AsciiReader", "DamagedSource", "LasReader", "PointReader", "ReadTally", "SourceError", "SourceHeader",
    "classify", "open_points", "scan_time_of",
]


def classify(relpath: str, head: bytes) -> str:
    """'points', 'grid', 'sidecar' or 'other' from the name and the first bytes of a file."""
    suffix = PurePosixPath(relpath.lower()).suffix
    if looks_like_las(head):
        return "points"
    if any(relpath.lower().endswith(s) for s in SIDECAR_SUFFIXES):
        return "sidecar"
    if suffix == ".asc" and head.lstrip().lower().startswith(b"ncols"):
        return "grid"
    if suffix in GRID_SUFFIXES and suffix != ".asc":
        return "grid"
    if suffix in POINT_TEXT_SUFFIXES and _looks_like_point_rows(head):
        return "points"
    return "other"


def _looks_like_point_rows(head: bytes) -> bool:
    """Text whose first lines include one with at least three numbers: a point export, not a note."""
    if b"\x00" in head:
        return False
    lines = head.decode("utf-8", "replace").splitlines()[:20]
    return any(len(re.findall(r"[-+]?\d+(?:\.\d+)?(?:[eE][-+]?\d+)?", ln)) >= 3 for ln in lines[:-1] or lines)


def open_points(fs, path: str, relpath: str, size: int, head: bytes, site_file) -> PointReader:
    """The reader for one point file; ``fs``/``path`` locate it, ``relpath`` names it in messages."""

    def opener():
        return fs.open(path, "rb")

    if looks_like_las(head):
        return LasReader(opener, relpath, size, renames=site_file.rename)
    return AsciiReader(opener, relpath, size, site_file)
