"""The self-contained HTML report of a run directory."""

from harness.report.run_report import render_report, write_report

__all__ = ["render_report", "write_report"]
