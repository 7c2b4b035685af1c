"""Check a shelf against its own catalog: schemas, hrefs, sizes, checksums, counts, index.

A shelf read from elsewhere is untrusted, so every href is resolved inside the shelf root and
anything absolute or escaping is reported rather than followed. Every problem names the file.
An object whose size or checksum differs from the catalog's is reported damaged and never
parsed; anything that still fails to parse is a finding, never a crash.
"""

from __future__ import annotations

import io
import json
from dataclasses import dataclass, field
from typing import Any

import pyarrow.parquet as pq

from archive.catalog import schema
from archive.catalog.grids import store_fingerprint
from archive.catalog.index import index_table, read_index
from archive.catalog.store import ShelfFiles, multihash_sha256, resolve_href
from archive.layout import CATALOG, MANIFEST, SCANS_INDEX


@dataclass
class VerifyReport:
    """Outcome of ``verify_shelf``: ``ok`` when ``problems`` is empty."""

    shelf: str
    problems: list[str] = field(default_factory=list)
    damaged: set[str] = field(default_factory=set)  # shelf-relative files whose size or checksum differs
    documents: int = 0
    assets: int = 0
    bytes_checked: int = 0

    @property
    def ok(self) -> bool:
        return not self.problems

    def summary(self) -> str:
        head = (
            f"{self.shelf}: {self.documents} STAC documents, {self.assets} assets "
            f"({self.bytes_checked / 1e6:.1f} MB read) checked"
        )
        if self.ok:
            return head + " - all good"
        return "\n".join([head + f" - {len(self.problems)} problem(s):", *("  " + p for p in self.problems)])


def verify_shelf(
    shelf_url: str, online: bool = False, quick: bool = False, storage_options: dict | None = None
) -> VerifyReport:
    """Validate every catalog document and check every asset against its file.

    ``quick`` compares sizes only (no checksums, no point counts); ``online`` also validates
    against the official extension schemas by URL.
    """
    shelf = ShelfFiles(shelf_url, storage_options)
    report = VerifyReport(shelf=shelf.url)
    if not shelf.exists(CATALOG):
        report.problems.append(f"{CATALOG}: missing - not a shelf, or its catalog was never written")
        return report
    items: dict[str, dict[str, Any]] = {}
    online_validator = schema.OnlineValidator() if online else None
    todo = [CATALOG]
    seen: set[str] = set()
    while todo:
        path = todo.pop(0)
        if path in seen:
            continue
        seen.add(path)
        doc = _load(shelf, path, report)
        if doc is None:
            continue
        report.documents += 1
        try:
            _check_document(shelf, path, doc, items, todo, online_validator, quick, report)
        except Exception as err:  # a damaged document of an unforeseen shape is a finding
            report.problems.append(f"{path}: cannot be checked, damaged? ({type(err).__name__}: {err})")
    for step in (_check_index, _check_orphans):
        try:
            step(shelf, items, report)
        except Exception as err:  # noqa: BLE001 (same)
            report.problems.append(f"{SCANS_INDEX if step is _check_index else 'scans/items'}: cannot be checked "
                                   f"({type(err).__name__}: {err})")
    if shelf.exists(MANIFEST):
        _check_manifest(shelf, quick, report)
    return report


def _check_document(shelf: ShelfFiles, path: str, doc: Any, items: dict[str, dict[str, Any]], todo: list[str],
                    online_validator: Any, quick: bool, report: VerifyReport) -> None:
    """Schemas, links and assets of one STAC document."""
    if not isinstance(doc, dict):
        report.problems.append(f"{path}: not a JSON object, damaged?")
        return
    report.problems += [f"{path}: {p}" for p in schema.validate(doc, online_validator)]
    if doc.get("type") == "Feature":
        items[path] = doc
    links = doc.get("links", [])
    for link in links if isinstance(links, list) else []:
        if not isinstance(link, dict):
            continue  # the schema check above has reported it
        target = _resolve(path, link.get("href", ""), report)
        if target is None:
            continue
        if link.get("rel") in ("child", "item"):
            todo.append(target)
        elif not shelf.exists(target):
            report.problems.append(f"{path}: link rel={link.get('rel')} -> {target} does not exist")
        elif "file:checksum" in link and not quick:
            _check_link_file(shelf, target, link, report)
    assets = doc.get("assets", {})
    for key, asset in assets.items() if isinstance(assets, dict) else ():
        if isinstance(asset, dict):
            _check_asset(shelf, path, key, asset, doc, quick, report)


def _check_manifest(shelf: ShelfFiles, quick: bool, report: VerifyReport) -> None:
    """A published copy's manifest.parquet: readable, and every file it lists has its size and SHA-256."""
    try:
        data = shelf.read_bytes(MANIFEST)
        if data[:4] != b"PAR1" or data[-4:] != b"PAR1":
            raise ValueError("no Parquet magic bytes at its start and end")
        table = pq.read_table(io.BytesIO(data), page_checksum_verification=True)  # CRCs written by publish
        rows = list(zip(*(table.column(c).to_pylist() for c in ("path", "size", "sha256"))))
    except Exception as err:  # noqa: BLE001 (a damaged manifest is a finding)
        report.problems.append(f"{MANIFEST}: not readable, damaged? ({type(err).__name__}: {err})")
        return
    for rel, size, digest in rows:
        if not isinstance(rel, str) or rel in report.damaged:
            continue
        try:
            target = resolve_href(MANIFEST, rel)
        except ValueError as err:
            report.problems.append(f"{MANIFEST}: {err}")
            continue
        if not shelf.exists(target):
            report.problems.append(f"{target}: listed in {MANIFEST} but missing")
        elif shelf.size(target) != size:
            report.problems.append(f"{target}: size {shelf.size(target)} bytes, {MANIFEST} says {size}")
        elif not quick and shelf.sha256(target) != digest:
            report.problems.append(f"{target}: checksum differs from {MANIFEST}'s; the file is damaged or was changed")


def _check_link_file(shelf: ShelfFiles, target: str, link: dict[str, Any], report: VerifyReport) -> None:
    """Linked files that carry file:size/file:checksum (the search index) are checked like assets."""
    import hashlib

    from archive.catalog.store import multihash_sha256

    data = shelf.read_bytes(target)
    if link.get("file:size") is not None and len(data) != link["file:size"]:
        report.problems.append(f"{target}: size {len(data)} bytes, catalog says {link['file:size']}")
        report.damaged.add(target)
    elif multihash_sha256(hashlib.sha256(data).hexdigest()) != link["file:checksum"]:
        report.problems.append(f"{target}: checksum differs from the catalog's; the file is damaged or was changed")
        report.damaged.add(target)


def _check_orphans(shelf: ShelfFiles, items: dict[str, dict[str, Any]], report: VerifyReport) -> None:
    """Item files no Collection links to are invisible to readers: a half-finished update."""
    base = shelf.path("scans/items")
    for path in sorted(shelf.fs.glob(f"{base}/*/*.json")):
        rel = "scans/items/" + path[len(base) + 1 :]
        if rel not in items:
            report.problems.append(f"{rel}: Item file not linked from scans/collection.json")


def _load(shelf: ShelfFiles, path: str, report: VerifyReport) -> dict[str, Any] | None:
    if not shelf.exists(path):
        report.problems.append(f"{path}: linked from the catalog but missing")
        return None
    try:
        return shelf.read_json(path)
    except ValueError as err:
        report.problems.append(f"{path}: {err}")
        return None


def _resolve(path: str, href: str, report: VerifyReport) -> str | None:
    try:
        return resolve_href(path, href)
    except ValueError as err:
        report.problems.append(f"{path}: {err}")
        return None


def _check_asset(
    shelf: ShelfFiles, path: str, key: str, asset: dict, doc: dict, quick: bool, report: VerifyReport
) -> None:
    target = _resolve(path, asset.get("href", ""), report)
    if target is None:
        return
    report.assets += 1
    where = f"{target} (asset '{key}' of {path})"
    if not shelf.exists(target):
        report.problems.append(f"{where}: file missing")
        return
    is_store = shelf.fs.isdir(shelf.path(target))
    if is_store:
        if quick:
            size, checksum = sum(i["size"] for i in shelf.fs.find(shelf.path(target), detail=True).values()), None
        else:
            size, checksum = store_fingerprint(shelf, target)
        expected_sum = asset.get("scanshelf:store_checksum")
    else:
        size = shelf.size(target)
        checksum = None if quick else multihash_sha256(shelf.sha256(target))
        expected_sum = asset.get("file:checksum")
    if not quick:
        report.bytes_checked += size
    if "file:size" in asset and asset["file:size"] != size:
        report.problems.append(f"{where}: size is {size} bytes, catalog says {asset['file:size']}")
        report.damaged.add(target)
    if expected_sum is None:
        report.problems.append(f"{where}: no checksum in the catalog")
    elif checksum is not None and checksum != expected_sum:
        report.problems.append(f"{where}: checksum differs from the catalog (file changed or damaged)")
        report.damaged.add(target)
    if target in report.damaged:
        return  # never parse a damaged object
    if not quick and key == "points" and "pc:count" in doc.get("properties", {}):
        with shelf.fs.open(shelf.path(target), "rb") as f:
            try:
                rows = pq.ParquetFile(f).metadata.num_rows
            except Exception as err:  # a damaged footer is a finding, not a crash
                report.problems.append(f"{where}: not readable as Parquet: {err}")
                return
        if rows != doc["properties"]["pc:count"]:
            report.problems.append(f"{where}: holds {rows} points, catalog says {doc['properties']['pc:count']}")


def _check_index(shelf: ShelfFiles, items: dict[str, dict[str, Any]], report: VerifyReport) -> None:
    """The index must hold exactly the Items linked from the scans Collection, unchanged."""
    if not shelf.exists(SCANS_INDEX):
        report.problems.append(f"{SCANS_INDEX}: missing")
        return
    if SCANS_INDEX in report.damaged:
        return  # reported as damaged; its columns would only repeat that
    try:
        table = read_index(shelf)
        meta = table.schema.metadata or {}
        geo = json.loads(meta[b"geo"]) if b"geo" in meta else {}
    except Exception as err:
        report.problems.append(f"{SCANS_INDEX}: not readable, damaged? ({type(err).__name__}: {err})")
        return
    if "covering" not in geo.get("columns", {}).get("geometry", {}):
        report.problems.append(f"{SCANS_INDEX}: GeoParquet 'geo' metadata with a bbox covering is missing")
    if b"stac-geoparquet" not in meta:
        report.problems.append(f"{SCANS_INDEX}: 'stac-geoparquet' metadata is missing")
    by_id = {d["id"]: d for d in items.values()}
    indexed = table.column("id").to_pylist()
    for missing in sorted(set(by_id) - set(indexed)):
        report.problems.append(f"{SCANS_INDEX}: Item {missing} is in the catalog but not in the index")
    for extra in sorted(set(indexed) - set(by_id)):
        report.problems.append(f"{SCANS_INDEX}: row {extra} has no Item JSON in the catalog")
    if set(indexed) != set(by_id) or len(indexed) != len(set(indexed)):
        return
    try:
        expected = index_table(list(by_id.values()))
    except (ValueError, KeyError, TypeError) as err:  # already reported per Item above
        report.problems.append(f"{SCANS_INDEX}: cannot be compared with the Item JSON: {err}")
        return
    for name in expected.column_names:
        if name not in table.column_names:
            report.problems.append(f"{SCANS_INDEX}: column {name!r} missing")
        elif name == "item_json":
            want = [json.loads(t) for t in expected.column(name).to_pylist()]
            for text, w in zip(table.column(name).to_pylist(), want, strict=True):
                try:
                    same = json.loads(text) == w
                except (ValueError, TypeError):
                    same = False
                if not same:
                    report.problems.append(f"{SCANS_INDEX}: item_json of {w['id']} differs from its Item JSON")
        elif table.column(name).to_pylist() != expected.column(name).to_pylist():
            report.problems.append(f"{SCANS_INDEX}: column {name!r} does not match the Item JSON files")
