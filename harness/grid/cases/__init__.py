"""Case grids: TOML files naming a cross product of audit settings, expanded into tasks."""

from harness.grid.cases.case_grid import Case, KernelEntry, PointSetEntry, SolverEntry
from harness.grid.cases.case_reader import case_from_text, load_case, parse_toml
from harness.grid.cases.problems import CaseFileError, CaseProblem
from harness.grid.cases.units import format_bytes, parse_bytes

__all__ = [
    "Case",
    "CaseFileError",
    "CaseProblem",
    "KernelEntry",
    "PointSetEntry",
    "SolverEntry",
    "case_from_text",
    "format_bytes",
    "load_case",
    "parse_bytes",
    "parse_toml",
]
