"""catalog_schema/: our JSON Schemas are valid draft 2020-12 and say what they are."""

from __future__ import annotations

import json
import re
import tomllib
from pathlib import Path

import jsonschema
import pytest

from archive.catalog import extensions as ext
from archive.sitefile import SiteFileError, parse_site_file

ROOT = Path(__file__).resolve().parents[1]
SCHEMAS = sorted((ROOT / "catalog_schema").rglob("*.json"))


def _load(path: Path) -> dict:
    return json.loads(path.read_text())


@pytest.mark.parametrize("path", SCHEMAS, ids=lambda p: str(p.relative_to(ROOT)))
def test_schema_is_valid_draft_2020_12_with_versioned_id(path: Path) -> None:
    # reference: JSON Schema draft 2020-12 meta-schema (as bundled with the jsonschema package)
    schema = _load(path)
    assert schema["$schema"] == "https://json-schema.org/draft/2020-12/schema"
    jsonschema.Draft202012Validator.check_schema(schema)
    assert re.search(r"[/-]v\d+(\.\d+)*[/.]", schema["$id"]), "the $id carries a version"


def test_every_extension_we_emit_has_a_local_rendering() -> None:
    assert len(SCHEMAS) == len(ext.LOCAL_SCHEMAS) + 1  # + the site file schema
    for url, rel in ext.LOCAL_SCHEMAS.items():
        schema = _load(ext.local_schema_path(url))
        if url == ext.SCANSHELF:
            assert schema["$id"] == url
        else:
            assert "rendering" in schema["$comment"] and url in schema["$comment"]
            assert not schema["$id"].startswith("https://stac-extensions.github.io/"), rel


def test_own_schema_rejects_bad_values() -> None:
    validator = jsonschema.Draft202012Validator(_load(ext.local_schema_path(ext.SCANSHELF)))
    good = {
        "type": "Feature",
        "stac_extensions": [ext.SCANSHELF],
        "properties": {
            "scanshelf:station": "north",
            "scanshelf:duration": 12.5,
            "scanshelf:source_path": "north/a.las",
            "scanshelf:source_checksum": "1220" + "ab" * 32,
            "scanshelf:partial": False,
        },
        "assets": {},
        "links": [],
    }
    assert not list(validator.iter_errors(good))
    for key, value in (
        ("scanshelf:duration", -1),
        ("scanshelf:source_checksum", "ab" * 32),  # no multihash prefix
        ("scanshelf:station", "north cam"),  # not a plain id
        ("scanshelf:scanner_origin", [1.0, 2.0]),
    ):
        bad = json.loads(json.dumps(good))
        bad["properties"][key] = value
        assert list(validator.iter_errors(bad)), key
    missing = json.loads(json.dumps(good))
    del missing["properties"]["scanshelf:source_path"]
    assert list(validator.iter_errors(missing))


def test_example_site_file_matches_its_schema() -> None:
    schema = _load(ROOT / "catalog_schema" / "site.schema.json")
    data = tomllib.loads((ROOT / "examples" / "site.toml").read_text())
    validator = jsonschema.Draft202012Validator(schema)
    assert not list(validator.iter_errors(data))
    parse_site_file(data, "examples/site.toml")  # the lead's loader accepts the same file
    bad_files = [
        ({"grids": {"cell": 0}}, r"\[grids\.cell\] is 0, must be greater than 0"),
        ({"paths": {"station": "^([^/]+)/"}}, r"\[paths\.station\] .* does not match"),
        ({"colour": "red"}, r"unknown field\(s\) 'colour'"),
        ({"catalog": {"providers": [{"roles": ["producer"]}]}}, r"'name' is a required property"),
        ({"paths": {"include": "**/*.las"}}, r"\[paths\.include\] is '\*\*/\*\.las', must be a list"),
        ({"grids": {"extent": {"north": 5}}}, r"\[grids\.extent\.north\] is 5, must be a list"),
        ({"stations": {"a": {"id": "a", "origin": 5}}}, r"\[stations\.a\.origin\] is 5, must be a list"),
        ({"stations": {"a": {"id": "a", "origin": [1, 2]}}}, r"\[stations\.a\.origin\] is \[1, 2\], must hold 3"),
        ({"ascii": {"places": 3.5}}, r"\[ascii\.places\] is 3\.5, must be a whole number"),
        ({"version": 2}, r"\[version\] is 2"),
    ]
    for bad, message in bad_files:
        assert list(validator.iter_errors(bad)), bad
        with pytest.raises(SiteFileError, match=message):  # the loader refuses it too, and says why
            parse_site_file(bad, "bad.toml")


def _fields_missing(schema: dict, value: object, where: str, defs: dict) -> list[str]:
    """Schema properties that the example never shows, walking objects, maps and arrays together."""
    if "$ref" in schema:
        schema = defs[schema["$ref"].removeprefix("#/$defs/")]
    missing = []
    if isinstance(value, dict):
        for name, sub in schema.get("properties", {}).items():
            if name not in value:
                missing.append(f"{where}.{name}")
            else:
                missing += _fields_missing(sub, value[name], f"{where}.{name}", defs)
        extra = schema.get("additionalProperties")
        if isinstance(extra, dict):  # a map such as [stations] or grids.extent: one entry must show it all
            if not value:
                missing.append(f"{where}.<entry>")
            for name in value:
                missing += _fields_missing(extra, value[name], f"{where}.{name}", defs)
    elif isinstance(value, list) and isinstance(schema.get("items"), dict):
        if not value:
            missing.append(f"{where}[]")
        shown = [set(_fields_missing(schema["items"], item, f"{where}[]", defs)) for item in value]
        missing += sorted(set.intersection(*shown)) if shown else []
    return missing


def test_example_site_file_shows_every_schema_field() -> None:
    # reference: the schema itself, walked property by property; the example must validate (jsonschema)
    schema = _load(ROOT / "catalog_schema" / "site.schema.json")
    data = tomllib.loads((ROOT / "examples" / "site.toml").read_text())
    assert not list(jsonschema.Draft202012Validator(schema).iter_errors(data))
    assert _fields_missing(schema, data, "site.toml", schema.get("$defs", {})) == []
    # the walk is able to fail: drop one nested field and it is named
    data["catalog"]["providers"][0].pop("description")
    assert _fields_missing(schema, data, "site.toml", schema["$defs"]) == ["site.toml.catalog.providers[].description"]


def test_wheels_carry_every_schema() -> None:
    """pyproject's package-data globs (setuptools) must cover every file of catalog_schema/, which
    wheels install as archive/catalog_schema, or an installed scanshelf cannot validate offline."""
    config = tomllib.loads((ROOT / "pyproject.toml").read_text())["tool"]["setuptools"]
    assert config["package-dir"]["archive.catalog_schema"] == "catalog_schema"
    shipped = {p for pattern in config["package-data"]["archive.catalog_schema"]
               for p in (ROOT / "catalog_schema").glob(pattern)}
    assert set(SCHEMAS) == shipped and shipped
    assert set(ext.LOCAL_SCHEMAS.values()) <= {str(p.relative_to(ROOT / "catalog_schema")) for p in shipped}
