"""The one door to storage: every URL or path goes through fsspec here."""

from __future__ import annotations

import os
from typing import Any

import fsspec
from fsspec.core import url_to_fs


def filesystem(url: str | os.PathLike, storage_options: dict[str, Any] | None = None):
    """(filesystem, path) for a local path or any fsspec URL."""
    url = os.fspath(url)
    fs, path = url_to_fs(url, **(storage_options or {}))
    return fs, path.rstrip("/") or path


def join(root: str, relpath: str) -> str:
    return f"{root.rstrip('/')}/{relpath}" if relpath else root


def is_local(fs) -> bool:
    return isinstance(fs, fsspec.implementations.local.LocalFileSystem)
