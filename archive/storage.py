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


def find_files(fs, root: str) -> dict[str, dict[str, Any]]:
    """Path → {"size", "mtime"} of every file below ``root``, as ``fs.find(detail=True)`` gives.

    On a local disk this is a plain ``os.walk`` with one ``os.stat`` per file: about twice as
    fast as fsspec's ``find`` on a cube of thousands of objects, which every catalog update lists.
    """
    if not is_local(fs):
        return {p: i for p, i in fs.find(root, detail=True).items() if i.get("type") == "file"}
    out: dict[str, dict[str, Any]] = {}
    for folder, _, files in os.walk(root):
        for name in files:
            path = os.path.join(folder, name)
            st = os.stat(path)
            out[path] = {"size": st.st_size, "mtime": st.st_mtime}
    return out
