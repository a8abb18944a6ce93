"""Rendering a run's summary: the HTML page, its plots and the exported files."""

from hopwell.report.exports import write_ensemble, write_report
from hopwell.report.page import format_table, html_page

__all__ = ["format_table", "html_page", "write_ensemble", "write_report"]
