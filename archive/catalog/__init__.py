"""The shelf's STAC catalog: Items per scan, Collections, the search index, and checks.

Public entry points used by migrate, the CLI and tests. They are imported on first use
(archive/lazy.py): the site file needs only ``archive.catalog.extensions``, not the pystac
and rasterio behind the builders.
"""

from __future__ import annotations

from typing import TYPE_CHECKING

from archive.lazy import exports

if TYPE_CHECKING:
    from archive.catalog.build import (
        CatalogResult,
        build_catalog,
        rebuild_catalog,
        records_from_ledger,
        update_catalog,
    )
    from archive.catalog.collections import GridInfo
    from archive.catalog.footprint import outline
    from archive.catalog.verify import VerifyReport, verify_shelf

_HOMES = {
    "CatalogResult": "archive.catalog.build",
    "GridInfo": "archive.catalog.collections",
    "VerifyReport": "archive.catalog.verify",
    "build_catalog": "archive.catalog.build",
    "outline": "archive.catalog.footprint",
    "rebuild_catalog": "archive.catalog.build",
    "records_from_ledger": "archive.catalog.build",
    "update_catalog": "archive.catalog.build",
    "verify_shelf": "archive.catalog.verify",
}

__all__ = [
    "CatalogResult",
    "GridInfo",
    "VerifyReport",
    "build_catalog",
    "outline",
    "rebuild_catalog",
    "records_from_ledger",
    "update_catalog",
    "verify_shelf",
]

__getattr__, __dir__ = exports(__name__, _HOMES)
