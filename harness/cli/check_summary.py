"""``covaudit check``'s terminal output: the fitted model, the verdict table, the
recommendation (when none qualifies, each unresolved value's reasons and what to do, the
report's advice), the frontier across solvers, the refit and the warnings (each once), and
the failed (solver, knob value) points that make the exit code 3."""

from __future__ import annotations

import math
from typing import Any

from harness.audit.rule import SOLVER_FAILED
from harness.check.check_records import UNCONVERGED_REMEDY, CheckResult
from harness.cli.frontier_summary import frontier_lines
from harness.report.check_report import no_pick_advice
from harness.report.condense import shorten
from harness.report.labels import metric_label
from harness.report.run_summary import DOES_NOT_PAY


def summary(result: CheckResult) -> str:
    """The verdict table for the terminal."""
    solver = result.solver.get("name", "?")
    version = result.solver.get("version")
    per = "tolerance" if result.knob_name == "tol" else f"{result.knob_name} value"
    lines = [f"covaudit check: {result.source}: {result.n:,} points (all fitted; "
             f"{result.n_holdout:,} held out for the kriging evaluation), kernel "
             f"{result.kernel}, mean {result.mean}, reference {result.reference}",
             f"  solver      {solver}{f' {version}' if version else ''}, "
             f"{len(result.solver_seeds)} seed(s) per {per} (the worst decides)",
             "  parameters  " + ", ".join(f"{k} = {_short(v)}" for k, v in result.params.items()),
             "  SE          " + ", ".join(f"{k} = {_short(v)}"
                                          for k, v in result.se["natural"].items()),
             f"  loglik      {result.loglik:.10g}"]
    if result.se.get("microergodic") is not None:
        lines.append(f"  s2/l^(2nu)  {result.se['microergodic']:.6g} "
                     f"(SE {result.se['microergodic_se']:.3g})")
    shown = ("loglik_error", "param_shift_se", "kriging_mean_sd", "mloe", "mmom")
    knob = result.knob_name
    column = metric_label("tol").short if knob == "tol" else knob
    header = (f"  {column:>9} {metric_label('verdict').short:>10} "
              + " ".join(f"{metric_label(n).short:>14}" for n in shown)
              + f" {metric_label('speedup').short:>9}")
    lines += ["", header]
    broke: list[str] = []
    for row in result.tolerances:
        status = row.status or ("safe" if row.safe else "unsafe")
        if row.error and not row.metrics:
            broke.append(f"  [{len(broke) + 1}] {_at(knob, row.value, short=True)}: "
                         f"{row.error}")
            lines.append(f"  {_cell(knob, row.value)} {status:>10}  "
                         f"{shorten(row.error, 60)} [{len(broke)}]")
            continue
        vals = [row.metric(n) for n in ("loglik_error", "param_shift_se", "kriging_mean_sd",
                                        "mloe", "mmom")]
        cells = " ".join(f"{(v.value if v else float('nan')):>14.3g}" for v in vals)
        lines.append(f"  {_cell(knob, row.value)} {status:>10} {cells} "
                     f"{row.speedup or float('nan'):>9.3g}")
    lines += broke
    lines.append("  " + "; ".join(f"{metric_label(n).short}: {metric_label(n).label}"
                                  for n in shown[:3])
                 + "; MLOE, MMOM: loss of prediction efficiency (see check.html's legend)")
    lines.append("")
    if not result.fit_converged:
        lines.append("  every verdict was measured at an unconverged estimate, so none is "
                     f"safe: {UNCONVERGED_REMEDY}")
    picked = result.recommended_value
    if picked is None:
        noun = "tolerance" if knob == "tol" else f"{knob} value"
        lines.append(f"  recommendation: no {noun} in the list qualifies ("
                     + str(result.recommendation.get("reason", "none is safe")) + ")")
        lines += [f"  unresolved at {_at(knob, row.value, short=True)}: "
                  + "; ".join(row.reasons)
                  for row in result.tolerances if row.status == "unresolved" and row.reasons]
        lines.append(f"  what to do: {no_pick_advice(result, noun)}")
    else:
        best = next(r for r in result.tolerances if r.value == picked)
        speedup = result.speedup if result.speedup is not None else float("nan")
        times = (f": {best.seconds * speedup:.3g} s against {best.seconds:.3g} s "
                 "per log-likelihood evaluation"
                 if result.speedup is not None and math.isfinite(best.seconds) else "")
        pace = (f"{speedup:.3g}x faster than {result.speedup_over}" if not speedup < 1 else
                f"speed-up {speedup:.3g}x: slower than {result.speedup_over}, "
                f"{DOES_NOT_PAY}")
        lines.append(f"  recommendation: {_at(knob, picked)} ({pace}{times})")
    lines += frontier_lines(result)
    if result.refit:
        refit_value = (result.refit.tol if result.refit.knob_value is None
                       else result.refit.knob_value)
        lines.append(f"  refit at {_at(knob, refit_value)}: largest shift "
                     f"{result.refit.max_shift_se:.3g} SE, loglik change "
                     f"{result.refit.loglik_change:.3g} nat, "
                     f"{result.refit.accepted_steps} step(s) accepted")
        if result.refit.accepted_steps == 0 or not result.refit.converged:
            lines.append(f"  refit: {result.refit.note}")
    lines += [f"WARNING: {w}" for w in dict.fromkeys(result.warnings)]  # each once
    lines.append("  thresholds are common practice chosen for covaudit, not a published "
                 "standard")
    return "\n".join(lines)


def _at(knob: str, value: float | None, *, short: bool = False) -> str:
    """``tol 1e-06`` (``tol 1e-06`` as ``1e-06`` in the short form) or ``rho = 6``."""
    if value is None:
        return "exact"
    if knob == "tol":
        return f"tol {value:.0e}" if short else f"tol {value:g}"
    return f"{knob} = {value:g}"


def _cell(knob: str, value: float | None) -> str:
    """A value in the table's first column: ``1e-06`` for tol, ``6`` for another knob."""
    if value is None:
        return f"{'exact':>9}"
    return f"{value:>9.0e}" if knob == "tol" else f"{value:>9g}"


def _short(value: Any) -> str:
    if isinstance(value, list):
        return "(" + ", ".join(f"{v:.4g}" for v in value) + ")"
    return f"{value:.4g}" if isinstance(value, float) else str(value)



def failed_points(result: CheckResult) -> list[str]:
    """The reasons of every (solver, knob value) whose status is "solver failed"."""
    if not result.solvers:
        return [row.error for row in result.tolerances if row.status == SOLVER_FAILED]
    return [point.get("error") or f"solver {entry['given']!r} failed"
            for entry in result.solvers for point in entry["points"]
            if point.get("status") == SOLVER_FAILED]
