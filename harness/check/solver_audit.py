"""One solver's audit in a check: its trial before the fit, then every knob value on
every solver seed through the one audit engine (``harness.audit.engine``), as rows of
the check's verdict table."""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

from harness.audit import engine as audit_engine
from harness.audit.engine import (
    AuditData,
    EngineResult,
    PairedReference,
    ToleranceAudit,
    ValueReference,
)
from harness.audit.solver_seeds import seed_option, solver_seed, solver_seeds
from harness.audit.solver_trial import trial_solver
from harness.check.check_options import CheckOptions
from harness.check.check_records import ToleranceResult
from harness.check.check_state import CheckState
from harness.check.fit_stage import FitOutcome
from harness.check.plugin_guard import trial_kernel
from harness.check.solver_lineup import LinedUpSolver
from harness.check.solver_timing import PointTiming
from harness.model.kernels import Kernel

Progress = Callable[[str], None]


@dataclass(frozen=True)
class SolverAudit:
    """One solver's audit: its rows (one per knob value), the rule's recommendation, the
    seeds it ran on, its timing (None when not timed) and the one-line failure of a
    solver that failed before its audit (its trial)."""

    lined: LinedUpSolver
    rows: tuple[ToleranceResult, ...] = ()
    result: EngineResult | None = None
    seeds: tuple[int, ...] = ()
    timings: tuple[PointTiming, ...] | None = None
    failure: str = ""

    @property
    def pick(self) -> float | None:
        return None if self.result is None else self.result.recommendation.tol

    def reason(self) -> str:
        if self.failure:
            return self.failure
        return "" if self.result is None else self.result.recommendation.reason


def tolerance_row(audit: ToleranceAudit, reference: str) -> ToleranceResult:
    """The engine's audit of one knob value as a row of the check's table."""
    v = audit.verdict
    return ToleranceResult(
        tol=audit.tol, knob_name=audit.knob_name, knob_value=v.tol, safe=v.safe,
        reference=reference,
        metrics=audit.worst_metrics(), seconds=audit.seconds, speedup=audit.speedup,
        nbytes=audit.nbytes, error="; ".join(v.failures), status=v.status,
        reasons=v.reasons, seeds=tuple(s.to_dict() for s in audit.seeds),
        spread={k: s.to_dict() for k, s in v.spread.items()})


def trial_before_fit(lined: LinedUpSolver, x: np.ndarray, y: np.ndarray,
                     options: CheckOptions, template: Kernel, say: Progress) -> list[str]:
    """The trial of a plugin on a few points before the fit
    (``harness.audit.solver_trial``); its warnings (none for a built-in, which is not
    tried). Raises ``SolverFailed``."""
    if lined.isolation is None or lined.solver.origin == "builtin":
        return []
    say(f"trial of solver {lined.given!r} on a few points, before the fit")
    return trial_solver(
        lined.solver, x, y, trial_kernel(options.kernel, options.shape, options.fixed_params,
                                         template, x, y, mean=options.mean),
        lined.values, dict(lined.options), rng=np.random.default_rng(options.seed),
        seed=solver_seed(options.seed, 0), isolation=lined.isolation)


def audit_solver(lined: LinedUpSolver, audit_data: AuditData,
                 reference: PairedReference | ValueReference, kind: str,
                 options: CheckOptions, fitted: FitOutcome, state: CheckState | None,
                 notes: list[str], say: Progress) -> SolverAudit:
    """Every knob value of one solver through the audit engine (module docstring 3)."""
    solver = lined.solver
    seeds = solver_seeds(options.seed, options.solver_seeds)
    if seed_option(solver.factory) is None:
        notes.append(f"solver {lined.given!r} declares no rng or seed option: treated as "
                     "deterministic, audited on one seed (more would repeat it)")
        seeds = seeds[:1]
    saved = None if state is None else state.for_solver(lined.index)
    if state is not None and (reused := state.saved_units(lined.values, seeds,
                                                          solver=lined.index))[1]:
        of = f" of {lined.given!r}" if len(options.solver_names) > 1 else ""
        say(f"reusing {reused[0]} of {len(lined.values)} knob values{of} "
            f"({reused[1]} of {len(lined.values) * len(seeds)} (knob value, seed) audits) "
            f"from {state.folder}")
    result = audit_engine.audit_tolerances(
        audit_data, solver, lined.values, reference, seeds=seeds,
        solver_options=lined.options, thresholds=options.thresholds,
        fit_converged=fitted.converged, progress=say,
        isolation=None if kind == "ladder" else lined.isolation, saved=saved)
    rows = tuple(tolerance_row(a, kind) for a in result.tolerances)
    return SolverAudit(lined=lined, rows=rows, result=result, seeds=tuple(seeds))
