"""scanshelf: migrate, publish and subset archives of repeated terrestrial laser scans.

The public API mirrors the command line: every command is one of these functions. They are
imported on first use (archive/lazy.py), so that ``import archive.migrate`` — every ``scanshelf``
run and every dask worker — does not pay for the xarray, dask and pandas that only
``elevation_change`` and ``open_shelf`` need.
"""

from __future__ import annotations

import sys
import types
from typing import TYPE_CHECKING, Any

from archive.lazy import exports

if TYPE_CHECKING:
    from archive.grids.change import elevation_change
    from archive.migrate import MigrateOptions, MigrateResult, migrate
    from archive.publish import publish
    from archive.query import Scan, Scans, Shelf, open_shelf
    from archive.survey import SurveyResult, survey

_HOMES = {
    "elevation_change": "archive.grids.change",
    "MigrateOptions": "archive.migrate", "MigrateResult": "archive.migrate", "migrate": "archive.migrate",
    "publish": "archive.publish",
    "Scan": "archive.query", "Scans": "archive.query", "Shelf": "archive.query", "open_shelf": "archive.query",
    "SurveyResult": "archive.survey", "survey": "archive.survey",
}

__all__ = [
    "MigrateOptions", "MigrateResult", "Scan", "Scans", "Shelf", "SurveyResult",
    "elevation_change", "migrate", "open_shelf", "publish", "survey",
]

__getattr__, __dir__ = exports(__name__, _HOMES)


class _Api(types.ModuleType):
    """``archive.migrate``, ``archive.publish`` and ``archive.survey`` name both a submodule and a function.

    Importing a submodule binds it as an attribute of its package. The function has always won
    that clash (``from archive import migrate`` is the function, as it was with eager imports),
    so the submodule is not bound here and ``__getattr__`` hands out the function.
    """

    def __setattr__(self, name: str, value: Any) -> None:
        if name in _HOMES and isinstance(value, types.ModuleType):
            return
        super().__setattr__(name, value)


sys.modules[__name__].__class__ = _Api
