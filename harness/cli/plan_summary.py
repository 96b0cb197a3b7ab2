"""The cost plan of ``covaudit check`` as printed before any work: one line per item,
each starting ``plan:`` (``harness.check.cost_plan.CostPlan``)."""

from __future__ import annotations

from harness.check.cost_plan import RESIDENT_PROCESSES, CostPlan, StagePlan
from harness.check.plan_calibration import UNIT_N
from harness.grid.cases.units import format_bytes


def _size(nbytes: float | None) -> str:
    return "not predicted" if nbytes is None else format_bytes(nbytes)


def _time(seconds: float | None, unit: float) -> str:
    if seconds is None:
        return "not predicted"
    return f"{seconds:.3g} s ({seconds / unit:.3g} units)"


def _stage_line(stage: StagePlan, unit: float) -> str:
    name = stage.stage + (f" {stage.solver}" if stage.solver else "")
    return (f"plan: {name}: {_time(stage.seconds, unit)}, memory "
            f"{_size(stage.peak_bytes)}; {stage.detail}")


def plan_lines(plan: CostPlan) -> list[str]:
    """The plan's lines: reference per metric, fit, each stage's time and memory, the
    peak against the budget, the total and the unit."""
    cal = plan.calibration
    unit = cal.unit_seconds
    by_metric = ", ".join(f"{group} {kind or 'not measured'}"
                          for group, kind in plan.reference_by_metric.items())
    if plan.fit is not None:
        fit = f"{plan.fit.engine} ({plan.fit.reason})"
    elif plan.fixed_fisher is not None:
        fit = (f"fixed parameters (--fixed-params); Fisher information: "
               f"{plan.fixed_fisher.engine} ({plan.fixed_fisher.reason})")
    else:
        fit = "fixed parameters (--fixed-params)"
    lines = [f"plan: n = {plan.n:,}, d = {plan.d}, {plan.n_params} kernel parameters, "
             f"{plan.n_holdout:,} held-out points, {plan.n_variance_points:,} with a "
             "variance",
             f"plan: reference by metric: {by_metric}",
             f"plan: fit: {fit}"]
    lines += [_stage_line(stage, unit) for stage in plan.stages]
    unknown = (f" (not predicted: {', '.join(plan.unknown)})" if plan.unknown else "")
    lines += [f"plan: peak memory {_size(plan.peak_bytes)} (stage {plan.peak_stage.stage}"
              + (f" {plan.peak_stage.solver}" if plan.peak_stage.solver else "")
              + f"), memory budget {_size(plan.memory_budget)}"
              + ("" if plan.fits_budget else ": OVER THE BUDGET")
              + f"; resident with {RESIDENT_PROCESSES} interpreters (check, fork server, "
              f"child) {_size(plan.resident_bytes)}",
              f"plan: total {_time(plan.total_seconds, unit)}{unknown}",
              f"plan: unit = one dpotrf at n = {UNIT_N:,} here, predicted {unit:.3g} s "
              f"from a dpotrf at n = {cal.probe_n:,} ({cal.probe_seconds:.3g} s) x "
              f"({UNIT_N:,} / {cal.probe_n:,})^3; calibration took {cal.seconds:.2g} s"]
    return lines
