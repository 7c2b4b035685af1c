"""Every Item and Collection of a migrated shelf against the extension schemas as published.

tests/reference/ holds the published schemas unchanged (tests/reference/README.md says where each
is published). Each ``$id`` resolves to its local file through a ``referencing`` registry, PROJJSON
too, so no test needs the network; the GeoJSON schemas come from pystac's own bundled copies.
"""

from __future__ import annotations

import copy
import json
from pathlib import Path

import jsonschema
import pytest
from referencing import Registry, Resource
from referencing.jsonschema import DRAFT7

from tests import factory
from tests.killing import write_source

REFERENCE = Path(__file__).resolve().parent / "reference"


def _refuse(uri: str) -> Resource:
    raise LookupError(f"no local copy of {uri}; add the published schema to tests/reference/")


def _registry() -> tuple[Registry, dict[str, dict]]:
    from pystac.validation.local_validator import get_local_schema_cache

    schemas = {}
    for path in sorted(REFERENCE.rglob("*.json")):
        schema = json.loads(path.read_text(encoding="utf-8"))
        schemas[schema["$id"].rstrip("#")] = schema
    bundled = {k: v for k, v in get_local_schema_cache().items() if k.startswith("https://geojson.org/")}
    resources = [(k, Resource.from_contents(v, default_specification=DRAFT7)) for k, v in {**bundled, **schemas}.items()]
    return Registry(retrieve=_refuse).with_resources(resources), schemas


@pytest.fixture(scope="module")
def documents(tmp_path_factory) -> list[tuple[str, dict]]:
    from archive.migrate import migrate

    base = tmp_path_factory.mktemp("published")
    write_source(base / "source", "all")
    assert migrate(str(base / "source"), str(base / "shelf"), crs=factory.SITE_CRS).ok
    shelf = base / "shelf"
    docs = [(str(p.relative_to(shelf)), json.loads(p.read_text())) for p in sorted(shelf.rglob("*.json"))
            if "zarr" not in str(p.relative_to(shelf))]
    return [(rel, d) for rel, d in docs if d.get("type") in ("Feature", "Collection")]


def _problems(doc: dict, registry: Registry, schemas: dict[str, dict]) -> list[str]:
    out = []
    for url in doc.get("stac_extensions", []):
        schema = schemas.get(url.rstrip("#"))
        if schema is None:
            continue  # scanshelf's own fields: catalog_schema/v1.0.0, checked in test_catalog_schema.py
        validator = jsonschema.Draft7Validator(schema, registry=registry)
        out += [f"{url}: {'/'.join(map(str, e.absolute_path))}: {e.message[:200]}" for e in validator.iter_errors(doc)]
    return out


def test_every_item_and_collection_meets_the_published_extension_schemas(documents) -> None:
    # reference: the STAC extension schemas and PROJJSON as published (tests/reference/README.md)
    registry, schemas = _registry()
    kinds = {d["type"] for _, d in documents}
    assert kinds == {"Feature", "Collection"} and len(documents) >= 6
    used = {u.rstrip("#") for _, d in documents for u in d.get("stac_extensions", [])}
    ours = {u for u in used if u.startswith("https://scanshelf.example/")}
    assert used - ours <= set(schemas), f"extensions without a published copy: {used - ours - set(schemas)}"
    assert {"https://stac-extensions.github.io/pointcloud/v2.0.0/schema.json",
            "https://stac-extensions.github.io/projection/v2.0.0/schema.json"} <= used
    for rel, doc in documents:
        assert not _problems(doc, registry, schemas), (rel, _problems(doc, registry, schemas))


def test_the_published_schemas_do_reject_bad_values(documents) -> None:
    """The check above can fail: values the published schemas forbid are found."""
    registry, schemas = _registry()
    rel, item = next((r, d) for r, d in documents if d["type"] == "Feature" and "pc:count" in d["properties"])
    for field, value in (("pc:count", -1), ("pc:type", 7), ("proj:code", 32633)):
        bad = copy.deepcopy(item)
        bad["properties"][field] = value
        assert _problems(bad, registry, schemas), (rel, field)
    bad = copy.deepcopy(item)
    bad["properties"]["proj:projjson"] = {"type": "NoSuchCRS"}  # PROJJSON v0.7 knows no such type
    assert _problems(bad, registry, schemas)
