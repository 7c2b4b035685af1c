"""The docs stand alone: every relative link in README.md, DEVELOPERS.md and docs/ resolves
to a file of this repository, and none leads outside it (a fresh clone has nothing beside it)."""

from __future__ import annotations

from pathlib import Path
from urllib.parse import unquote, urlsplit

import pytest
from markdown_it import MarkdownIt

ROOT = Path(__file__).resolve().parents[1]
DOCS = [ROOT / "README.md", ROOT / "DEVELOPERS.md", *sorted((ROOT / "docs").rglob("*.md"))]


def links(path: Path) -> list[str]:
    """Targets of every link and image, as a CommonMark parser reads them (code blocks excluded)."""
    # reference: markdown-it-py, a CommonMark-compliant parser
    found = []
    for block in MarkdownIt("commonmark").parse(path.read_text(encoding="utf-8")):
        for token in block.children or []:
            if token.type == "link_open":
                found.append(token.attrGet("href"))
            elif token.type == "image":
                found.append(token.attrGet("src"))
    return found


def test_docs_exist_and_link_somewhere():
    assert (ROOT / "docs" / "architecture.md").is_file()
    assert any("docs/architecture.md" in href for href in links(ROOT / "DEVELOPERS.md"))


@pytest.mark.parametrize("doc", DOCS, ids=lambda p: str(p.relative_to(ROOT)))
def test_relative_links_resolve_inside_the_repository(doc: Path):
    broken = []
    for href in links(doc):
        parts = urlsplit(href)
        if parts.scheme or parts.netloc or not parts.path:  # web links and same-page anchors
            continue
        target = (doc.parent / unquote(parts.path)).resolve()
        if not target.is_relative_to(ROOT) or not target.exists() or "shared" in Path(parts.path).parts:
            broken.append(href)
    assert broken == []
    assert "../shared" not in doc.read_text(encoding="utf-8")
