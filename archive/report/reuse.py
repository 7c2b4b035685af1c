"""Reuse a station's maps from the previous page when its cube has not changed.

Drawing a station's four maps costs about half a second; on a living shelf most stations have
no new epoch between two runs. Each map block of a page is wrapped in comments that carry a
key: SHA-256 over the station, the software version and the listing (path, size, mtime) of
every object of its cube. The next build of the same page copies a block whose key still
matches instead of drawing it again. Only local cubes get a key: object stores do not promise
modification times, and their pages are built once per publish anyway.
"""

from __future__ import annotations

import hashlib
import re

from archive.catalog.items import software_version
from archive.storage import filesystem, find_files, is_local

_BLOCK = re.compile(r"<!-- scanshelf-maps ([0-9a-f]{64}) -->(.*?)<!-- /scanshelf-maps -->", re.S)


def cube_key(station: str, cube_url: str, storage_options: dict | None = None) -> str | None:
    """The key of a station's maps, or None when the cube is not a local directory."""
    fs, root = filesystem(cube_url, storage_options)
    if not is_local(fs) or not fs.isdir(root):
        return None
    digest = hashlib.sha256(f"{station}\n{software_version()}\n".encode())
    for path, info in sorted(find_files(fs, root).items()):
        digest.update(f"{path[len(root):]}\t{info['size']}\t{info.get('mtime')}\n".encode())
    return digest.hexdigest()


def wrap(key: str | None, block: str) -> str:
    return block if key is None else f"<!-- scanshelf-maps {key} -->{block}<!-- /scanshelf-maps -->"


def earlier_blocks(page: str) -> dict[str, str]:
    """Key → map block, from a page this module's :func:`wrap` marked."""
    return {m.group(1): m.group(2) for m in _BLOCK.finditer(page)}
