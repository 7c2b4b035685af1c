"""The catalog that migrate writes for the shared small shelf passes every check."""

from __future__ import annotations

import json

from archive.catalog import verify_shelf
from archive.catalog import schema as stac_schema


def test_migrated_shelf_verifies(small_shelf) -> None:
    shelf, result, _ = small_shelf
    report = verify_shelf(str(shelf))
    assert report.ok, report.summary()
    items = sorted((shelf / "scans/items").rglob("*.json"))
    assert items and report.documents == len(items) + 3
    for path in items:
        doc = json.loads(path.read_text())
        assert doc["geometry"]["type"] in ("Polygon", "MultiPolygon")
        assert stac_schema.validate(doc) == [], path
