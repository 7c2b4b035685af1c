"""Reading and writing shelf files through fsspec, whole files at a time.

The catalog is small files that must never be seen half-written: locally each file goes to a
temporary name beside its target and is renamed into place; object stores make a single PUT
visible atomically, so there the file is written directly.
"""

from __future__ import annotations

import hashlib
import json
import posixpath
import uuid
from typing import Any

from archive.storage import filesystem, is_local

CHUNK = 4 * 1024 * 1024
MULTIHASH_SHA256 = "1220"  # multihash: code 0x12 (sha2-256), length 0x20 (32 bytes)


class ShelfFiles:
    """A shelf root on some filesystem; paths given to it are shelf-relative."""

    def __init__(self, url: str, storage_options: dict | None = None) -> None:
        self.fs, root = filesystem(url, storage_options)
        self.root = root.rstrip("/")
        self.url = str(url)

    def path(self, rel: str) -> str:
        return f"{self.root}/{rel}" if self.root else rel

    def exists(self, rel: str) -> bool:
        return self.fs.exists(self.path(rel))

    def read_bytes(self, rel: str) -> bytes:
        return self.fs.cat_file(self.path(rel))

    def read_json(self, rel: str) -> dict[str, Any]:
        try:
            return json.loads(self.read_bytes(rel))
        except json.JSONDecodeError as err:
            raise ValueError(f"{self.path(rel)} is not valid JSON: {err}") from err

    def write_bytes(self, rel: str, data: bytes) -> None:
        """Write all of ``data`` so that readers see the old file or the new one, never a part."""
        target = self.path(rel)
        parent = posixpath.dirname(target)
        if is_local(self.fs):
            self.fs.makedirs(parent, exist_ok=True)
            tmp = f"{target}.part-{uuid.uuid4().hex[:8]}"
            self.fs.pipe_file(tmp, data)
            self.fs.mv(tmp, target)
        else:
            self.fs.pipe_file(target, data)

    def write_json(self, rel: str, obj: dict[str, Any], pretty: bool = False) -> None:
        """Compact by default: indenting uses json's slow pure-Python encoder (10,000 Items)."""
        text = json.dumps(obj, indent=1 if pretty else None, ensure_ascii=False)
        self.write_bytes(rel, (text + "\n").encode())

    def remove(self, rel: str) -> None:
        if self.exists(rel):
            self.fs.rm_file(self.path(rel))

    def size(self, rel: str) -> int:
        return int(self.fs.size(self.path(rel)))

    def sha256(self, rel: str) -> str:
        """Hex SHA-256 of a shelf file, streamed so large Parquet files need little memory."""
        digest = hashlib.sha256()
        with self.fs.open(self.path(rel), "rb", block_size=CHUNK) as f:
            while block := f.read(CHUNK):
                digest.update(block)
        return digest.hexdigest()


def multihash_sha256(hex_digest: str) -> str:
    """The file extension's ``file:checksum``: lowercase-hex multihash of a SHA2-256 digest."""
    hex_digest = hex_digest.lower()
    if len(hex_digest) != 64 or any(c not in "0123456789abcdef" for c in hex_digest):
        raise ValueError(f"{hex_digest!r} is not a hex SHA-256 digest (64 hex digits)")
    return MULTIHASH_SHA256 + hex_digest


def relative_href(from_file: str, to_file: str) -> str:
    """Href from one shelf-relative file to another, e.g. item JSON -> points Parquet."""
    return posixpath.relpath(to_file, posixpath.dirname(from_file) or ".")


def resolve_href(from_file: str, href: str) -> str:
    """Shelf-relative path an href points at; refuses hrefs that leave the shelf."""
    if "://" in href or href.startswith("/"):
        raise ValueError(f"href {href!r} in {from_file} is not relative to the shelf")
    path = posixpath.normpath(posixpath.join(posixpath.dirname(from_file), href))
    if path == ".." or path.startswith("../"):
        raise ValueError(f"href {href!r} in {from_file} escapes the shelf root")
    return path
