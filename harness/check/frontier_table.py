"""The frontier's table: each (solver, knob value) point with its time, whether it is
non-dominated, each solver's pick, and the pick across solvers
(``harness.check.frontier``); the times from ``harness.check.solver_timing``."""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from harness.audit.audit_references import DENSE_CRASH_ADVICE
from harness.audit.engine import AuditData
from harness.audit.rule import SOLVER_FAILED
from harness.audit.solver_calls import SolverIsolation, call_solver
from harness.check.check_options import CheckOptions
from harness.check.fit_engines import DenseEngine
from harness.check.frontier import (
    FrontierPick,
    SolverPick,
    limit_ratio,
    nondominated,
    recommend_across,
)
from harness.check.solver_audit import SolverAudit
from harness.check.solver_lineup import Lineup
from harness.check.solver_timing import (
    ElapsedStopwatch,
    PointTiming,
    Stopwatch,
    default_repeats,
    time_fit_evaluations,
)
from harness.infra.child_process import StageCrashed, run_stage
from harness.infra.solver_timeout import default_solver_timeout
from harness.linalg.dense_budget import check_dense_budget
from harness.model.kernels import Kernel
from harness.references import DenseBudgetError


def timing_repeats(options: CheckOptions, n: int, solvers: int) -> int:
    """Timed fit evaluations per point: as asked, else the default with several solvers
    and none with one (module docstring 4)."""
    if options.timing_repeats is not None:
        return options.timing_repeats
    return default_repeats(n) if solvers > 1 else 0


def time_solver(audit: SolverAudit, audit_data: AuditData, options: CheckOptions,
                 repeats: int, stopwatch: Stopwatch | None, in_child: bool
                 ) -> tuple[tuple[PointTiming, ...] | None, str]:
    """The solver's ``PointTiming``s (module docstring 4), in a child process when any
    solver of the check runs in one, so that all are timed in the same layout; None and
    a one-line failure when the solver failed while timed."""
    lined = audit.lined
    arguments = (audit_data.points, audit_data.y, audit_data.kernel)
    keywords: dict[str, Any] = dict(mean=audit_data.mean, solver=lined.solver,
                                    label=lined.given, values=lined.values,
                                    options=dict(lined.options), base_seed=options.seed,
                                    repeats=repeats, stopwatch=stopwatch)
    if not in_child:
        return time_fit_evaluations(*arguments, **keywords), ""
    calls = len(lined.values) * (repeats + 1)
    per_call = (lined.isolation.timeout if lined.isolation is not None
                and lined.isolation.timeout is not None
                else options.solver_timeout or default_solver_timeout(int(audit_data.y.size)))
    isolation = SolverIsolation(timeout=per_call * calls)
    call = call_solver(time_fit_evaluations, *arguments, isolation=isolation,
                       who=f"solver {lined.given!r}",
                       where=f"while timed ({repeats} fit evaluations per knob value)",
                       **keywords)
    return (None, call.failure) if call.failure else (call.value, "")


def _timed_dense_evaluation(points: np.ndarray, y: np.ndarray, kernel: Kernel, mean: str,
                            memory_budget: int | None, stopwatch: Stopwatch) -> float:
    """Seconds of one dense fit evaluation (log-likelihood and exact score)."""
    engine = DenseEngine(points, y, kernel, mean=mean, memory_budget=memory_budget)
    return stopwatch.measure("exact", lambda: engine(kernel.theta))


def exact_time(kind: str, audit_data: AuditData, options: CheckOptions,
               audits: list[SolverAudit], timed: bool, stopwatch: Stopwatch | None
               ) -> float | None:
    """The exact computation's time on the frontier: one dense fit evaluation (log-
    likelihood and exact score, in a child process like every dense stage of a check)
    when the points were timed that way, the reference is dense and the score fits the
    memory budget; else the reference's log-likelihood time of the audits."""
    if timed and kind == "dense":
        n = int(audit_data.y.size)
        try:
            check_dense_budget(n, budget=options.memory_budget, score=True)
            return run_stage(_timed_dense_evaluation, audit_data.points, audit_data.y,
                             audit_data.kernel, audit_data.mean, options.memory_budget,
                             stopwatch or ElapsedStopwatch(),
                             stage="the timed dense fit evaluation", n=n,
                             advice=DENSE_CRASH_ADVICE)
        except (DenseBudgetError, StageCrashed):
            pass
    for audit in audits:
        for row in audit.rows:
            if row.speedup is not None and math.isfinite(row.seconds) \
                    and math.isfinite(row.speedup):
                return row.seconds * row.speedup
    return None


def point_time(audit: SolverAudit, position: int) -> tuple[float, tuple[float, ...],
                                                            dict[str, Any]]:
    """(seconds, repeats, time record) of the ``position``-th point of a solver."""
    row = audit.rows[position]
    if audit.timings is not None:
        timing = audit.timings[position]
        record = timing.to_dict() | {"peak_bytes": max(timing.peak_bytes, row.nbytes)}
        return timing.seconds, timing.repeats, record
    seconds = row.seconds if math.isfinite(row.seconds) else math.nan
    record = {"seconds": seconds if math.isfinite(seconds) else None,
              "repeats": [seconds] if math.isfinite(seconds) else [],
              "first_call_seconds": None, "peak_bytes": row.nbytes or None,
              "source": "audit log-likelihood (median over solver seeds)"}
    return seconds, tuple(record["repeats"]), record


def frontier_entries(audits: list[SolverAudit], lineup: Lineup, *,
                     exact_seconds: float | None, exact: str, repeats: int
                     ) -> tuple[list[dict[str, Any]], FrontierPick]:
    """The ``solvers`` entries (with non-dominated marks) and the pick across solvers."""
    times = {(i, j): point_time(audit, j) for i, audit in enumerate(audits)
             for j in range(len(audit.rows))}
    keys = list(times)
    ratios = [limit_ratio(audits[i].rows[j].to_dict())
              if audits[i].rows[j].status != SOLVER_FAILED else math.nan for i, j in keys]
    marks = dict(zip(keys, nondominated([(times[k][0], e) for k, e in zip(keys, ratios,
                                                                           strict=True)]),
                     strict=True))
    entries: list[dict[str, Any]] = []
    picks: list[SolverPick] = []
    for i, audit in enumerate(audits):
        knob = audit.lined.knob
        rendered = [row.to_dict() | {"time": times[(i, j)][2], "nondominated": marks[(i, j)]}
                    for j, row in enumerate(audit.rows)]
        pick = audit.pick
        position = next((j for j, r in enumerate(audit.rows) if r.value == pick), None)
        pick_repeats = () if position is None else times[(i, position)][1]
        picks.append(SolverPick(solver=audit.lined.given, knob_name=knob.name,
                                value=None if position is None else pick,
                                repeats=pick_repeats,
                                reason="" if position is not None else audit.reason()))
        status = "solver failed" if audit.failure or any(
            r.status == SOLVER_FAILED for r in audit.rows) else "audited"
        entries.append({
            "given": audit.lined.given, "solver": audit.lined.solver.to_dict(),
            "knob": {"name": knob.name, "range": knob.range_text(),
                     "more_accurate": knob.more_accurate, "values": list(audit.lined.values)},
            "status": status, "problem": audit.failure or None, "points": rendered,
            "pick": None if position is None else {"value": pick,
                                                   "seconds": picks[-1].to_dict()["seconds"]},
            "reason": None if position is not None else audit.reason()})
    for refused in lineup.refused:
        entries.append({"given": refused.given, "solver": None, "knob": None,
                        "status": "refused", "problem": refused.problem, "points": [],
                        "pick": None, "reason": refused.problem})
    return entries, recommend_across(picks, exact_seconds=exact_seconds, exact=exact,
                                     timing_repeats=repeats)
