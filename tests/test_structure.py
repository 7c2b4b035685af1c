"""The layout promises of DEVELOPERS.md, checked on the source itself (parsed with ast)."""

from __future__ import annotations

import ast
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
MODULES = sorted((ROOT / "archive").rglob("*.py"))


def _rel(path: Path) -> str:
    return path.relative_to(ROOT).as_posix()


def _trees():
    for path in MODULES:
        yield _rel(path), ast.parse(path.read_text(encoding="utf-8"), filename=str(path))


def test_storage_is_the_one_door_to_fsspec():
    """URLs become filesystems only in archive/storage.py, so options and fixes apply everywhere."""
    doors = {"url_to_fs", "filesystem", "open", "open_files", "get_fs_token_paths"}
    found = []
    for rel, tree in _trees():
        for node in ast.walk(tree):
            if rel == "archive/storage.py":
                break
            if isinstance(node, ast.Attribute) and node.attr in doors and "fsspec" in ast.unparse(node.value):
                found.append(f"{rel}:{node.lineno} {ast.unparse(node)}")
            elif isinstance(node, ast.ImportFrom) and (node.module or "").startswith("fsspec") and \
                    any(a.name in doors for a in node.names):
                found.append(f"{rel}:{node.lineno} from {node.module} import ...")
    assert found == []


def test_publish_and_report_do_not_reach_into_query():
    found = []
    for rel, tree in _trees():
        if not (rel == "archive/publish.py" or rel.startswith("archive/report/")):
            continue
        for node in ast.walk(tree):
            if isinstance(node, ast.ImportFrom) and (node.module or "").startswith("archive.query"):
                found.append(f"{rel}:{node.lineno} {node.module}")
    assert found == []


def test_class_names_are_unique():
    seen: dict[str, list[str]] = {}
    for rel, tree in _trees():
        for node in ast.walk(tree):
            if isinstance(node, ast.ClassDef):
                seen.setdefault(node.name, []).append(rel)
    assert {name: where for name, where in seen.items() if len(where) > 1} == {}
