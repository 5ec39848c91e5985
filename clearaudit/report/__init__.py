"""The human report (report.html), built only from a saved audit folder."""
from .html import build_report, render_report

__all__ = ["build_report", "render_report"]
