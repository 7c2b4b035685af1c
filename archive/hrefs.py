"""URLs and hrefs that cross a trust boundary: URLs shown to people, hrefs read from a shelf.

Publish, the health report and the query layer all name shelves in messages and follow hrefs
from catalogs they did not write, so the two checks live here, below all three.
"""

from __future__ import annotations

import posixpath
import re
from urllib.parse import urlsplit, urlunsplit


def redact(url: str) -> str:
    """A URL fit for messages and logs: no user, password or query string (signed URLs)."""
    parts = urlsplit(url)
    if len(parts.scheme) < 2 or parts.scheme == "file":  # paths, incl. Windows drive letters
        return url
    host = parts.hostname or ""
    if parts.port:
        host = f"{host}:{parts.port}"
    return urlunsplit((parts.scheme, host, parts.path, "", ""))


def safe_href(href: str, where: str) -> str:
    """A shelf-relative href, normalised; refuse schemes, absolute paths and escapes."""
    if re.match(r"^[A-Za-z][A-Za-z0-9+.-]*:", href) or href.startswith(("/", "\\")):
        raise ValueError(f"{where}: href {href!r} is not relative to the shelf root; refused")
    norm = posixpath.normpath(href)
    if norm == ".." or norm.startswith("../") or "\\" in norm:
        raise ValueError(f"{where}: href {href!r} escapes the shelf root; refused")
    return norm
