"""Case grids: TOML files naming a cross product of audit settings, expanded into tasks."""

from harness.cases.load import case_from_text, load_case, parse_toml
from harness.cases.model import Case, KernelEntry, PointSetEntry, SolverEntry
from harness.cases.problems import CaseFileError, CaseProblem
from harness.cases.units import format_bytes, parse_bytes

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
