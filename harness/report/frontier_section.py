"""The check report's section across solvers, as text for the template: the statement,
the pick, the ties, the solvers with no safe setting and why, the speed-ups, and one table
row per (solver, knob value) point.

Every value comes from ``CheckResult.solvers`` and ``CheckResult.frontier`` as
``check.json`` holds them (``harness.report.frontier_points``); nothing is recomputed, so
the report and the JSON agree.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

from harness.check.check_records import CheckResult
from harness.report.condense import shorten
from harness.report.frontier_points import (
    FRONTIER_METRICS,
    finite,
    first_call_seconds,
    knob_name_of,
    limit_of,
    median_seconds,
    metric_uncertainty,
    metric_value,
    peak_bytes,
    points_of,
    repeat_count,
)
from harness.report.labels import metric_label
from harness.report.number_text import compact, knob_value_text

#: Characters of a failure message shown in the table (the rest goes to a note).
PROBLEM_WIDTH = 60
MIB = 2.0**20


@dataclass(frozen=True)
class ErrorCell:
    """One error in the table: value, one standard error, and whether it is over its
    limit."""

    text: str
    uncertainty: str
    over: bool


@dataclass(frozen=True)
class FrontierRow:
    """One (solver, knob value) point, or one line for a solver with no point."""

    solver: str
    knob: str
    status: str
    nondominated: str
    seconds: str
    repeats: str
    first_call: str
    errors: tuple[ErrorCell, ...]
    peak_mib: str
    note: str
    note_index: int | None
    picked: bool


def _setting(entry: Mapping[str, Any]) -> str:
    """``hodlr at tol 1e-6 (0.12 s)`` for a pick or a tie."""
    name = str(entry.get("knob_name", "tol"))
    value = finite(entry.get("value"))
    seconds = finite(entry.get("seconds"))
    timed = f" ({compact(seconds)} s)" if seconds is not None else ""
    return f"{entry.get('solver', '')} at {name} {knob_value_text(name, value)}{timed}"


def _error_cell(point: Mapping[str, Any], name: str, limit: float | None) -> ErrorCell:
    value = metric_value(point, name)
    unc = metric_uncertainty(point, name)
    return ErrorCell(compact(value), compact(unc) if unc else "",
                     value is not None and limit is not None and abs(value) > limit)


def _point_row(solver: Mapping[str, Any], point: Mapping[str, Any],
               limits: dict[str, float | None], picked: bool,
               notes: list[str]) -> FrontierRow:
    given = str(solver.get("given", ""))
    knob = knob_name_of(solver)
    value = finite(point.get("knob_value"))
    error = str(point.get("error") or "")
    note_index = None
    if error:
        notes.append(f"{given} at {knob} {knob_value_text(knob, value)}: {error}")
        note_index = len(notes)
    peak = peak_bytes(point)
    return FrontierRow(
        solver=given, knob=f"{knob} {knob_value_text(knob, value)}",
        status=str(point.get("status") or ""),
        nondominated="yes" if point.get("nondominated") else "no",
        seconds=compact(median_seconds(point)), repeats=compact(repeat_count(point)),
        first_call=compact(first_call_seconds(point)),
        errors=tuple(_error_cell(point, n, limits[n]) for n in FRONTIER_METRICS),
        peak_mib=compact(peak / MIB) if peak is not None else "",
        note="pick" if picked else shorten(error, PROBLEM_WIDTH) if error else "",
        note_index=note_index, picked=picked)


def _solver_row(solver: Mapping[str, Any], notes: list[str]) -> FrontierRow:
    """The one line of a solver refused or failed before its first point."""
    given = str(solver.get("given", ""))
    problem = str(solver.get("problem") or solver.get("reason") or "")
    note_index = None
    if problem:
        notes.append(f"{given}: {problem}")
        note_index = len(notes)
    return FrontierRow(given, knob_name_of(solver), str(solver.get("status") or ""), "",
                       "", "", "", tuple(ErrorCell("", "", False) for _ in FRONTIER_METRICS),
                       "", shorten(problem, PROBLEM_WIDTH), note_index, False)


def frontier_rows(result: CheckResult) -> tuple[list[FrontierRow], list[str]]:
    """The table's rows (solvers in the order listed, points loose to tight) and the full
    text of every failure the table shortens."""
    chosen = (result.frontier or {}).get("recommended")
    limits = {n: limit_of(result.solvers, result.thresholds, n) for n in FRONTIER_METRICS}
    rows: list[FrontierRow] = []
    notes: list[str] = []
    for solver in result.solvers:
        points = points_of(solver)
        if not points:
            rows.append(_solver_row(solver, notes))
        for point in points:
            picked = (isinstance(chosen, Mapping)
                      and chosen.get("solver") == solver.get("given")
                      and chosen.get("value") == point.get("knob_value"))
            rows.append(_point_row(solver, point, limits, picked, notes))
    return rows, notes


def frontier_summary(result: CheckResult) -> dict[str, Any]:
    """The recommendation across solvers in words, for the template: a solver's problem
    is listed apart only when it is not already its reason for having no safe setting."""
    frontier = result.frontier or {}
    chosen = frontier.get("recommended")
    exact = str(frontier.get("exact") or "exact computation")
    over_exact = finite(frontier.get("speedup_over_exact"))
    exact_seconds = finite(frontier.get("exact_seconds"))
    speedups = []
    if over_exact is not None:
        timed = f", {compact(exact_seconds)} s" if exact_seconds is not None else ""
        speedups.append(f"{compact(over_exact)}\u00d7 over the exact computation "
                        f"({exact}{timed})")
    over_solvers = frontier.get("speedup_over_solvers")
    if isinstance(over_solvers, Mapping):
        speedups += [f"{compact(finite(ratio))}\u00d7 over {given}"
                     for given, ratio in over_solvers.items()]
    no_safe = [(str(n.get("solver", "")), str(n.get("reason", "")))
               for n in frontier.get("no_safe") or () if isinstance(n, Mapping)]
    problems = [f"{s.get('given', '')}: {s.get('status', '')}, {s.get('problem')}"
                for s in result.solvers if s.get("problem")
                and (str(s.get("given", "")), str(s.get("problem"))) not in no_safe]
    limits = {n: limit_of(result.solvers, result.thresholds, n) for n in FRONTIER_METRICS}
    return {
        "statement": str(frontier.get("statement") or ""),
        "pick": _setting(chosen) if isinstance(chosen, Mapping) else "",
        "ties": [_setting(t) + (f", p = {compact(finite(t.get('p_value')))}"
                                if finite(t.get("p_value")) is not None else "")
                 for t in frontier.get("tied_with") or () if isinstance(t, Mapping)],
        "no_safe": [f"{given}: {reason}" for given, reason in no_safe],
        "solver": str(chosen.get("solver", "")) if isinstance(chosen, Mapping) else "",
        "problems": problems, "speedups": speedups,
        "metrics": [metric_label(n) for n in FRONTIER_METRICS],
        "limits": [compact(limits[n]) if limits[n] is not None else ""
                   for n in FRONTIER_METRICS],
    }
