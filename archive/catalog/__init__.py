"""The shelf's STAC catalog: Items per scan, Collections, the search index, and checks.

Public entry points used by migrate, the CLI and tests.
"""

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
