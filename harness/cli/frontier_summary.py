"""The terminal's frontier table of a check of several solvers (``check --solver A
--solver B``): every (solver, knob value) point with its verdict, time and errors, the
non-dominated points starred, then the recommendation across solvers in words."""

from __future__ import annotations

import math
from collections.abc import Mapping
from typing import Any

from harness.check.check_records import CheckResult
from harness.report.condense import shorten
from harness.report.labels import metric_label

#: The metric columns of the table (the frontier figure's panels).
FRONTIER_COLUMNS = ("loglik_error", "param_shift_se", "kriging_mean_sd")


def _setting(knob: str, value: float | None) -> str:
    if value is None:
        return "-"
    return f"tol {value:.0e}" if knob == "tol" else f"{knob} {value:g}"


def _number(entry: Any) -> str:
    value = entry.get("value") if isinstance(entry, Mapping) else None
    return f"{value:>13.3g}" if isinstance(value, int | float) and math.isfinite(value) \
        else f"{'-':>13}"


def frontier_lines(result: CheckResult) -> list[str]:
    """The lines (none for a check of one solver with nothing refused)."""
    if len(result.solvers) < 2:
        return []
    frontier = result.frontier
    repeats = int(frontier.get("timing_repeats") or 0)
    how = (f"median of {repeats} timed fit evaluations (factorization, log-likelihood and "
           "score) after a warm-up" if repeats else
           "median log-likelihood time of the audit's solver seeds")
    width = max(12, *(len(str(e["given"])) for e in result.solvers))
    lines = ["", f"  frontier: time = {how}; * = non-dominated",
             f"  {'solver':<{width}} {'setting':<15} {'verdict':>14} {'time (s)':>10} "
             + " ".join(f"{metric_label(n).short:>13}" for n in FRONTIER_COLUMNS)]
    for entry in result.solvers:
        if entry["status"] == "refused":
            lines.append(f"  {entry['given']:<{width}} refused: {shorten(entry['problem'], 70)}")
            continue
        if not entry["points"]:
            lines.append(f"  {entry['given']:<{width}} {entry['status']}: "
                         f"{shorten(entry.get('problem') or '', 70)}")
            continue
        knob = entry["knob"]["name"]
        for point in entry["points"]:
            seconds = point["time"].get("seconds")
            time_text = f"{seconds:>10.3g}" if seconds is not None else f"{'-':>10}"
            star = " *" if point.get("nondominated") else ""
            lines.append(f"  {entry['given']:<{width}} {_setting(knob, point['knob_value']):<15} "
                         f"{point['status']:>14} {time_text} "
                         + " ".join(_number(point.get(n)) for n in FRONTIER_COLUMNS) + star)
    lines.append(f"  recommendation across solvers: {frontier.get('statement', '')}")
    return lines
