"""Write (or bring up to date) the whole STAC catalog of a shelf.

Order matters for readers that may look at any moment: Item files first, then the
Collections, then the index, and the root ``catalog.json`` last, each file replaced whole.
An update writes only new or changed Items; extents, summaries, the index and the root are
recomputed from the Items held in the index, so no Item JSON has to be re-read.
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field, replace
from datetime import datetime, timezone
from typing import Any

import pyarrow as pa

from archive.catalog.collections import (
    PROVIDER_PLACEHOLDER,
    TITLE_PLACEHOLDER,
    GridInfo,
    grids_collection,
    root_catalog,
    scans_collection,
)
from archive.catalog.grids import HashMemo, discover_grids, store_fingerprint
from archive.catalog.index import index_table, items_of, merge_index, read_index, write_index
from archive.catalog.items import scan_item
from archive.catalog.store import ShelfFiles
from archive.layout import (
    SCANS_INDEX,
    CATALOG,
    GRIDS_COLLECTION,
    LEDGER,
    SCANS_COLLECTION,
    ScanId,
    item_path,
)
from archive.records import ScanRecord


@dataclass
class CatalogResult:
    """What a build or update wrote."""

    written: list[str] = field(default_factory=list)  # shelf-relative paths, in write order
    removed: list[str] = field(default_factory=list)
    item_count: int = 0
    grid_count: int = 0
    warnings: list[str] = field(default_factory=list)


def build_catalog(
    shelf_url: str,
    records: Sequence[ScanRecord],
    grids: Sequence[GridInfo | Mapping[str, Any]] | None = None,
    settings: Mapping[str, Any] | None = None,
    storage_options: dict | None = None,
    memo: HashMemo | None = None,
) -> CatalogResult:
    """Write the complete catalog for exactly ``records``; Items of other scans are removed.

    ``grids`` describes the Zarr cubes (None: read them from the shelf); ``settings`` is the
    site file's [catalog] table (license, title, providers); ``memo`` keeps the cubes' object
    hashes between runs (see :func:`store_fingerprint`).
    """
    shelf = ShelfFiles(shelf_url, storage_options)
    old = _old_index(shelf)
    keep = {r.scan_id for r in records}
    stale = [] if old is None else [i for i in old.column("id").to_pylist() if i not in keep]
    return _write(shelf, records, old, stale, grids, settings or {}, keep_old=False, memo=memo)


def update_catalog(
    shelf_url: str,
    new_records: Sequence[ScanRecord],
    removed_ids: Iterable[str] = (),
    grids: Sequence[GridInfo | Mapping[str, Any]] | None = None,
    settings: Mapping[str, Any] | None = None,
    storage_options: dict | None = None,
    memo: HashMemo | None = None,
) -> CatalogResult:
    """Add or replace the Items of ``new_records``, drop ``removed_ids``, refresh the rest.

    ``settings`` None keeps the license, title and providers already in the catalog.
    """
    shelf = ShelfFiles(shelf_url, storage_options)
    old = _old_index(shelf)
    if settings is None:
        settings = settings_from_catalog(shelf)
    return _write(shelf, new_records, old, list(removed_ids), grids, settings, keep_old=True, memo=memo)


def _old_index(shelf: ShelfFiles) -> pa.Table | None:
    """The index as it stands; rebuilt from the Item files when only they survive."""
    if shelf.exists(SCANS_INDEX):
        return read_index(shelf)
    if shelf.exists(SCANS_COLLECTION):
        return index_table(_walk_items(shelf))
    return None


def _write(
    shelf: ShelfFiles,
    records: Sequence[ScanRecord],
    old: pa.Table | None,
    removed_ids: list[str],
    grids: Sequence[GridInfo | Mapping[str, Any]] | None,
    settings: Mapping[str, Any],
    keep_old: bool,
    memo: HashMemo | None,
) -> CatalogResult:
    result = CatalogResult()
    now = datetime.now(timezone.utc).replace(microsecond=0)
    before = items_of(old, (r.scan_id for r in records)) if old is not None else {}
    items = []
    for record in records:
        published = before.get(record.scan_id, {}).get("properties", {}).get("published")
        item = scan_item(
            record,
            published=_parse(published) if published else now,
            thumbnail=_thumbnail(shelf, record, result),
        )
        path = item_path(ScanId.parse(record.scan_id))
        shelf.write_json(path, item)
        result.written.append(path)
        items.append(item)
    rewritten = {r.scan_id for r in records}
    for scan_id in (s for s in removed_ids if s not in rewritten):
        path = item_path(ScanId.parse(scan_id))
        if shelf.exists(path):
            shelf.remove(path)
            result.removed.append(path)
    index = merge_index(old if keep_old else None, items, removed_ids)
    if index.num_rows == 0:
        raise ValueError(f"no scans to catalog on {shelf.url}: migrate at least one scan first")
    scans = scans_collection(index, settings)
    cubes = [GridInfo.coerce(g) for g in grids] if grids is not None else discover_grids(shelf)
    cubes = [_fingerprinted(shelf, g, memo) for g in cubes]
    size, checksum = write_index(shelf, index, collection={k: v for k, v in scans.items() if k != "links"})
    result.written.append(SCANS_INDEX)
    _fingerprint_index_link(scans, size, checksum)
    for path, doc in (
        (SCANS_COLLECTION, scans),
        (GRIDS_COLLECTION, grids_collection(cubes, settings, scans["extent"])),
    ):
        shelf.write_json(path, doc, pretty=True)
        result.written.append(path)
    shelf.write_json(CATALOG, root_catalog(settings), pretty=True)
    result.written.append(CATALOG)
    result.item_count, result.grid_count = index.num_rows, len(cubes)
    return result


def _fingerprint_index_link(scans: dict[str, Any], size: int, checksum: str) -> None:
    """Put the index's size and checksum on the Collection's link to it, so verify finds bit rot there too."""
    for link in scans["links"]:
        if link["rel"] == "alternate" and link["href"].endswith("items.parquet"):
            link["file:size"] = size
            link["file:checksum"] = checksum


def _parse(text: str) -> datetime:
    return datetime.fromisoformat(text.replace("Z", "+00:00"))


def _thumbnail(shelf: ShelfFiles, record: ScanRecord, result: CatalogResult) -> tuple[int, str] | None:
    if not record.preview_href:
        return None
    if not shelf.exists(record.preview_href):
        result.warnings.append(f"{record.scan_id}: preview {record.preview_href} is missing; no thumbnail asset")
        return None
    return shelf.size(record.preview_href), shelf.sha256(record.preview_href)


def _fingerprinted(shelf: ShelfFiles, g: GridInfo, memo: HashMemo | None) -> GridInfo:
    if g.size is not None and g.checksum is not None:
        return g
    if not shelf.exists(g.href):
        raise FileNotFoundError(f"grid cube {shelf.path(g.href)} does not exist; write it before the catalog")
    size, checksum = store_fingerprint(shelf, g.href, memo)
    return replace(g, size=size, checksum=checksum)


def _walk_items(shelf: ShelfFiles) -> list[dict[str, Any]]:
    root = shelf.path("scans/items")
    return [shelf.read_json(p[len(shelf.root) + 1 :]) for p in sorted(shelf.fs.glob(f"{root}/*/*.json"))]


def settings_from_catalog(shelf: ShelfFiles) -> dict[str, Any]:
    """Recover the [catalog] settings from a catalog written earlier (placeholders dropped)."""
    if not shelf.exists(SCANS_COLLECTION):
        return {}
    scans = shelf.read_json(SCANS_COLLECTION)
    settings: dict[str, Any] = {}
    if scans.get("license") and scans["license"] != "other":
        settings["license"] = scans["license"]
    providers = [p for p in scans.get("providers", []) if p.get("name") != PROVIDER_PLACEHOLDER]
    if providers:
        settings["providers"] = providers
    if shelf.exists(CATALOG):
        title = shelf.read_json(CATALOG).get("title")
        if title and title != TITLE_PLACEHOLDER:
            settings["title"] = title
    return settings


def records_from_ledger(shelf_url: str) -> list[ScanRecord]:
    """Every finished scan in the shelf's ledger (read-only; the ledger is local only)."""
    from archive.ledger import iter_scan_records

    shelf = ShelfFiles(shelf_url)
    if not shelf.exists(LEDGER):
        raise FileNotFoundError(
            f"{shelf.path(LEDGER)} not found: `scanshelf catalog` needs a local shelf written by migrate"
        )
    return list(iter_scan_records(shelf.path(LEDGER)))


def rebuild_catalog(
    shelf_url: str, settings: Mapping[str, Any] | None = None, storage_options: dict | None = None
) -> CatalogResult:
    """Rebuild the whole catalog from the ledger and the cubes on the shelf."""
    records = records_from_ledger(shelf_url)
    if settings is None:
        settings = settings_from_catalog(ShelfFiles(shelf_url, storage_options))
    return build_catalog(shelf_url, records, None, settings, storage_options)
