"""Reading a run directory and summarizing it for verdicts, comparisons and reports."""

from harness.analysis.load import RunData, RunDirError, load_run

__all__ = ["RunData", "RunDirError", "load_run"]
