"""Reports of runs and of regression compares: one self-contained HTML file with its PNGs.

* :func:`build_run_report` — verdict, limits, grid, heat maps, worst points, identities.
* :func:`build_compare_report` — the compare's summary, side-by-side and change maps, overlays.
"""

from labseq.report.compare_report import build_compare_report
from labseq.report.html import SAFETY_NOTE
from labseq.report.run_report import ReportFiles, build_run_report

__all__ = ["SAFETY_NOTE", "ReportFiles", "build_compare_report", "build_run_report"]
