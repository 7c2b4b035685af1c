"""Human-facing outputs: preview pictures of grids and change maps."""

from archive.report.previews import render_change, render_preview

__all__ = ["render_change", "render_preview"]

# the health report (archive.report.html); appended, the lines above are the previews' exports
from archive.report.html import ReportResult, build_report, write_index_html  # noqa: E402

__all__ += ["ReportResult", "build_report", "write_index_html"]
