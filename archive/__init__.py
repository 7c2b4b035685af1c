"""scanshelf: migrate, publish and subset archives of repeated terrestrial laser scans.

The public API mirrors the command line: every command is one of these functions.
"""

from archive.grids.change import elevation_change
from archive.migrate import MigrateOptions, MigrateResult, migrate
from archive.publish import publish
from archive.query import Scan, Scans, Shelf, open_shelf
from archive.survey import SurveyResult, survey

__all__ = [
    "MigrateOptions", "MigrateResult", "Scan", "Scans", "Shelf", "SurveyResult",
    "elevation_change", "migrate", "open_shelf", "publish", "survey",
]
