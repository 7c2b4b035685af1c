"""The STAC extensions the shelf's catalog uses, and where their schemas live offline.

Official extension schemas are fetched by URL, which fails without a network. So for each
extension we emit, catalog_schema/extensions/ holds our own rendering of its published field
definitions; offline validation maps the official URL to that file. Our own fields have their
own schema whose ``$id`` is a stable URL of our design, also mapped to its local file.
"""

from __future__ import annotations

from pathlib import Path

POINTCLOUD = "https://stac-extensions.github.io/pointcloud/v2.0.0/schema.json"
PROJECTION = "https://stac-extensions.github.io/projection/v2.0.0/schema.json"
FILE = "https://stac-extensions.github.io/file/v2.1.0/schema.json"
DATACUBE = "https://stac-extensions.github.io/datacube/v2.2.0/schema.json"
TIMESTAMPS = "https://stac-extensions.github.io/timestamps/v1.1.0/schema.json"
PROCESSING = "https://stac-extensions.github.io/processing/v1.2.0/schema.json"
SCANSHELF = "https://scanshelf.example/catalog_schema/v1.0.0/schema.json"

PREFIX = "scanshelf:"

_HERE = Path(__file__).resolve()
# the source tree's top-level folder, else the copy a wheel installs inside the package
SCHEMA_DIR = next(
    (d for d in (_HERE.parents[2] / "catalog_schema", _HERE.parents[1] / "catalog_schema") if d.is_dir()),
    _HERE.parents[2] / "catalog_schema",
)

LOCAL_SCHEMAS: dict[str, str] = {
    POINTCLOUD: "extensions/pointcloud-v2.0.0.json",
    PROJECTION: "extensions/projection-v2.0.0.json",
    FILE: "extensions/file-v2.1.0.json",
    DATACUBE: "extensions/datacube-v2.2.0.json",
    TIMESTAMPS: "extensions/timestamps-v1.1.0.json",
    PROCESSING: "extensions/processing-v1.2.0.json",
    SCANSHELF: "v1.0.0/schema.json",
}


def local_schema_path(url: str) -> Path:
    """The file holding our schema for an extension URL; a clear error when there is none."""
    try:
        path = SCHEMA_DIR / LOCAL_SCHEMAS[url]
    except KeyError:
        raise KeyError(
            f"no offline schema for STAC extension {url}; add one under {SCHEMA_DIR} "
            "and list it in archive/catalog/extensions.py, or validate with --online"
        ) from None
    if not path.is_file():
        raise FileNotFoundError(
            f"{path} is missing: reinstall scanshelf (its wheel carries catalog_schema/ inside "
            "the archive package)"
        )
    return path
