"""Human-facing outputs: preview pictures of grids and change maps, and the health report.

The names are imported on first use (archive/lazy.py): a worker rendering one scan's preview
needs archive.report.previews, not the report page behind it (zarr, pystac, the charts).
"""

from __future__ import annotations

from typing import TYPE_CHECKING

from archive.lazy import exports

if TYPE_CHECKING:
    from archive.report.html import ReportResult, build_report, write_index_html
    from archive.report.previews import render_change, render_preview

_HOMES = {
    "render_change": "archive.report.previews", "render_preview": "archive.report.previews",
    "ReportResult": "archive.report.html", "build_report": "archive.report.html",
    "write_index_html": "archive.report.html",
}

__all__ = ["render_change", "render_preview", "ReportResult", "build_report", "write_index_html"]

__getattr__, __dir__ = exports(__name__, _HOMES)
