"""Check STAC documents offline against three independent readings of the spec.

1. The STAC 1.1 core JSON Schemas that pystac ships inside its package (loaded from the
   installed package, never copied here), with every remote reference refused.
2. stac-pydantic, an independent implementation of the core model.
3. A pystac round trip: what pystac reads back must serialise to the same JSON.
Then every extension listed in ``stac_extensions`` is checked against our local rendering of
its field definitions (catalog_schema/), or, with ``online=True``, also against the official
schema fetched by URL.
"""

from __future__ import annotations

import json
from functools import cache
from typing import Any

import jsonschema
import pystac
from pystac.validation.local_validator import get_local_schema_cache
from referencing import Registry, Resource

from archive.catalog import extensions as ext

_TYPES = {"Feature": "item", "Collection": "collection", "Catalog": "catalog"}
_CORE = "https://schemas.stacspec.org/v{version}/{kind}-spec/json-schema/{kind}.json"


def _refuse(uri: str) -> Resource:
    raise LookupError(f"offline validation will not fetch {uri}")


@cache
def _core_validator(kind: str, version: str) -> jsonschema.protocols.Validator:
    schemas = get_local_schema_cache()
    uri = _CORE.format(version=version, kind=kind)
    if uri not in schemas:
        raise LookupError(
            f"pystac {pystac.__version__} ships no STAC {version} {kind} schema; "
            "write the catalog with the STAC version pystac ships"
        )
    registry = Registry(retrieve=_refuse).with_resources(
        (k, Resource.from_contents(v)) for k, v in schemas.items()
    )
    schema = schemas[uri]
    return jsonschema.validators.validator_for(schema)(schema, registry=registry)


@cache
def _extension_validator(url: str) -> jsonschema.protocols.Validator:
    schema = json.loads(ext.local_schema_path(url).read_text())
    cls = jsonschema.validators.validator_for(schema)
    cls.check_schema(schema)
    return cls(schema, format_checker=cls.FORMAT_CHECKER)


def _errors(validator: jsonschema.protocols.Validator, doc: dict[str, Any], label: str) -> list[str]:
    out = []
    for err in sorted(validator.iter_errors(doc), key=lambda e: list(e.absolute_path)):
        where = "/".join(str(p) for p in err.absolute_path) or "(top)"
        out.append(f"{label}: {where}: {err.message[:300]}")
    return out


def core_problems(doc: dict[str, Any]) -> list[str]:
    """Problems found by pystac's shipped STAC core schemas."""
    kind = _TYPES.get(doc.get("type", ""))
    if kind is None:
        return [f"core: 'type' is {doc.get('type')!r}, not Feature, Collection or Catalog"]
    return _errors(_core_validator(kind, doc.get("stac_version", "")), doc, f"STAC {kind} schema")


def pydantic_problems(doc: dict[str, Any]) -> list[str]:
    """Problems found by stac-pydantic (reference implementation of the core model)."""
    from pydantic import ValidationError
    from stac_pydantic import Catalog, Collection, Item

    model = {"Feature": Item, "Collection": Collection, "Catalog": Catalog}.get(doc.get("type", ""))
    if model is None:
        return [f"stac-pydantic: unknown type {doc.get('type')!r}"]
    try:
        model.model_validate(doc)
    except ValidationError as err:
        return [f"stac-pydantic: {'/'.join(map(str, e['loc']))}: {e['msg']}" for e in err.errors()]
    return []


def roundtrip_problems(doc: dict[str, Any]) -> list[str]:
    """What changes when pystac reads the document and writes it back."""
    cls = {"Feature": pystac.Item, "Collection": pystac.Collection, "Catalog": pystac.Catalog}[doc["type"]]
    back = cls.from_dict(json.loads(json.dumps(doc)), preserve_dict=False, migrate=False)
    again = back.to_dict(include_self_link=False, transform_hrefs=False)
    if _canonical(again) == _canonical(doc):
        return []
    diff = sorted(k for k in set(doc) | set(again) if _canonical(doc.get(k)) != _canonical(again.get(k)))
    return [f"pystac round trip changed: {', '.join(diff)}"]


def _canonical(value: Any) -> str:
    return json.dumps(value, sort_keys=True)


def extension_problems(doc: dict[str, Any]) -> list[str]:
    """Problems against our local renderings of each listed extension's field definitions."""
    problems = []
    for url in doc.get("stac_extensions", []):
        try:
            validator = _extension_validator(url)
        except (KeyError, FileNotFoundError) as err:
            problems.append(f"extension {url}: {err.args[0]}")
            continue
        problems += _errors(validator, doc, f"extension {url}")
    return problems


class OnlineValidator:
    """Validates against the official extension schemas fetched by URL (needs a network).

    One instance per verify run: fetched schemas are cached, and a URL that cannot be fetched
    is reported once rather than for every document.
    """

    def __init__(self) -> None:
        from pystac.validation import JsonSchemaSTACValidator

        self._validator = JsonSchemaSTACValidator()
        self._unreachable: set[str] = set()

    def problems(self, doc: dict[str, Any]) -> list[str]:
        import logging

        from pystac.validation.stac_validator import GetSchemaError

        kind = {"Feature": pystac.STACObjectType.ITEM, "Collection": pystac.STACObjectType.COLLECTION,
                "Catalog": pystac.STACObjectType.CATALOG}[doc["type"]]
        quiet = logging.getLogger("pystac.validation.stac_validator")
        level, quiet.level = quiet.level, logging.CRITICAL  # it logs a traceback per failure
        problems = []
        try:
            for url in doc.get("stac_extensions", []):
                if url == ext.SCANSHELF or url in self._unreachable:
                    continue  # our own id has no web host; it is checked offline
                try:
                    self._validator.validate_extension(doc, kind, doc["stac_version"], url)
                except GetSchemaError as err:
                    self._unreachable.add(url)
                    problems.append(f"online: could not fetch {url} ({type(err.__cause__).__name__}); "
                                    "no network? validated offline against our rendering only")
                except pystac.STACValidationError as err:
                    problems.append(f"online {url}: {str(err).splitlines()[-1][:300]}")
        finally:
            quiet.level = level
        return problems


def validate(doc: dict[str, Any], online: OnlineValidator | None = None) -> list[str]:
    """All problems of one STAC document; empty when it passes every check."""
    problems = core_problems(doc) + pydantic_problems(doc) + extension_problems(doc)
    if not problems:
        problems += roundtrip_problems(doc)
    if online is not None:
        problems += online.problems(doc)
    return problems
