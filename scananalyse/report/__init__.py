"""The report: figures (:mod:`.figures`), which figures an analysis gets and in which order
(:mod:`.figlist`), its words (:mod:`.content`), the self-contained HTML page (:mod:`.html`)
and display-unit helpers (:mod:`.units`).

Everything here works on plain data (arrays in mm, mm/y, years; DataFrames with
the SI columns of the output files), so a notebook can draw any figure or render
a page without running the pipeline.
"""

from .html import ReportData, render_report, write_report
from . import figures, units

__all__ = ["ReportData", "render_report", "write_report", "figures", "units"]
