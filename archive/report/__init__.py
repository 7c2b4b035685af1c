"""Human-facing outputs: preview pictures of grids and change maps."""

from archive.report.previews import render_change, render_preview

__all__ = ["render_change", "render_preview"]
