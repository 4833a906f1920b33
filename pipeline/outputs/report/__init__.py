"""Self-contained HTML report of a monitoring run.

:func:`render_report` reads the result tables of one run and writes a
single HTML file with inline CSS and inline SVG charts (no network
requests).  The module split: :mod:`.data` reads the tables,
:mod:`.charts` draws the forest plot, the funnel plot and the uptake small
multiples, :mod:`.cells` formats and escapes cells, :mod:`.html` assembles the
page, and :mod:`.many_sites` holds the sections of the many-site layout
(more than 40 sites).
"""

from takeup.pipeline.outputs.report.data import ReportData, ReportError, load_report_data
from takeup.pipeline.outputs.report.html import render_report, report_html

__all__ = ["render_report", "report_html", "load_report_data", "ReportData", "ReportError"]
