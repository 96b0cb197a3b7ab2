"""The check of one or several solvers' knob sweeps on a user's dataset, end to end.

1. The parameters to audit at: the maximum-likelihood fit on ALL the user's points by
   the plan of ``harness.check.fit_plan`` (``harness.check.fit_stage``), or the given
   ``fixed_params``; the Fisher information there (the unit of the shift metrics, and the
   SEs). A fit that does not converge is a top-level warning and every verdict says so.
2. The reference (``reference``), chosen by the selector that ``run`` uses too
   (``harness.audit.reference_choice``): ``auto`` is the first of dense (within the
   memory budget), statespace (1D points, half-integer Matern), operator (when
   installed) that applies, the ladder with a warning when none does; ``dense``,
   ``statespace`` and ``operator`` ask for one kind; ``ladder`` (the solver at tol /
   ``ladder_factor``, a single ``tol`` solver only) is extra evidence only, verdicts at
   best unresolved. An at-scale estimate that is the Vecchia MLE (no exact refinement
   fitted the budget) gets its distance to the exact MLE from a value reference's exact
   score at the estimate (``harness.check.exact_distance``): in the fit's record and
   the notes, and a warning when it is measurably beyond the fit's tolerance.
3. For each solver (``harness.check.solver_lineup``: ``--solver`` repeatable, ``--sweep``
   its knob values), the audit engine (``harness.audit.engine.audit_tolerances``): every
   knob value on ``solver_seeds`` seeds of its randomness; likelihood and score metrics
   on all n points, kriging at a seeded random holdout (default 10%, at most
   ``holdout_points``) conditioned on the other points; the worst seed decides; the
   recommendation is the engine's rule. Every solver sees the same fit, reference,
   holdout and probes; a plugin runs only in child processes.
4. With several solvers, the time of one fit evaluation at every knob value
   (``harness.check.solver_timing``, median of ``timing_repeats``) and the frontier
   (``harness.check.frontier``): the fastest safe pick across solvers, ties by the
   Mann-Whitney test, solvers without a safe setting named. With one solver the time of
   a point is its audit's median log-likelihood time, unless ``timing_repeats`` asks.
5. An end-to-end refit with the recommended solver at its pick.
"""

from __future__ import annotations

import math
import time
from collections.abc import Callable, Mapping
from dataclasses import replace
from typing import Any

import numpy as np

from harness.audit import engine as audit_engine
from harness.audit.audit_references import (
    OperatorReference,
    build_reference,
    reference_by_metric,
)
from harness.audit.audit_sampling import (
    AUDIT_STREAMS,
    HoldoutSizeError,
    audit_streams,
    holdout_size,
    split_points,
    variance_positions,
)
from harness.audit.engine import (
    AuditData,
    HasValues,
    PairedReference,
    ValueReference,
)
from harness.audit.named_evaluation import dask_client
from harness.audit.operator_preconditioner import PreconditionerSpec
from harness.audit.sides import rademacher
from harness.audit.solver_trial import SolverFailed
from harness.check.check_options import (
    DEFAULT_FIT_TIME_BUDGET,
    DEFAULT_TOLERANCES,
    REFERENCE_CHOICES,
    CheckError,
    CheckOptions,
)
from harness.check.check_records import CheckResult, ToleranceResult
from harness.check.check_state import CheckState
from harness.check.data_checks import ValidatedData
from harness.check.exact_distance import BEYOND, ExactDistance, exact_distance
from harness.check.fit_stage import FitOutcome, fit_parameters, fixed_parameters, model_template
from harness.check.fitting import standard_errors
from harness.check.frontier import FrontierPick
from harness.check.frontier_table import (
    exact_time,
    frontier_entries,
    time_solver,
    timing_repeats,
)
from harness.check.ladder_growth import subsample_growth, with_growth
from harness.check.plugin_guard import prepare_solver_children
from harness.check.reference_kind import reference_kind
from harness.check.refit import isolated_refit, refit_with_solver
from harness.check.solver_audit import SolverAudit, audit_solver, trial_before_fit
from harness.check.solver_lineup import line_up
from harness.check.solver_timing import PointTiming, Stopwatch, timing_machine
from harness.check.vecchia_fit import REFINE_TOL_SE
from harness.infra.option_specs import LADDER_FACTOR, SOLVER_SEEDS, TIMING_REPEATS, TOLERANCE
from harness.model.kernels import Kernel

__all__ = ["DEFAULT_FIT_TIME_BUDGET", "DEFAULT_TOLERANCES", "REFERENCE_CHOICES", "CheckError",
           "CheckOptions", "holdout_indices", "recommend", "run_check", "split_holdout"]

Progress = Callable[[str], None]
#: What a speedup is measured against, by reference kind (the ladder: the solver itself).
SPEEDUP_OVER = {"dense": "dense", "operator": "the exact operator",
                "statespace": "the Kalman filter"}


#: Child streams of ``default_rng(seed)`` a check uses, in spawn order (the engine's,
#: ``harness.audit.audit_sampling``: a grid task draws its holdout and probes the same way).
CHECK_STREAMS: tuple[str, ...] = AUDIT_STREAMS


def check_streams(seed: int) -> dict[str, np.random.Generator]:
    """The check's random streams by name: one child of ``default_rng(seed)`` each."""
    return audit_streams(seed)


def holdout_indices(n: int, *, fraction: float, seed: int, cap: int | None = None
                    ) -> np.ndarray:
    """The kriging holdout ``run_check`` draws for ``n`` points at ``seed`` (for the map)."""
    return split_holdout(n, fraction, check_streams(seed)["split"], cap=cap)[1]


def _option_error(exc: HoldoutSizeError) -> CheckError:
    return CheckError(f"--{exc.option.replace('_', '-')}: {exc}")


def split_holdout(n: int, fraction: float, rng: np.random.Generator, *,
                  cap: int | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Random (conditioning, holdout) index arrays, holdout of round(fraction n) >= 5
    points, at most ``cap`` (the kriging evaluation; the fit and every other metric use
    all points)."""
    try:
        size = holdout_size(n, fraction, cap=cap)
    except HoldoutSizeError as exc:
        raise _option_error(exc) from None
    return split_points(n, size, rng)


def variance_subset(m: int, options: CheckOptions) -> np.ndarray:
    """Positions among the ``m`` held-out points that get a kriging variance."""
    try:
        return variance_positions(m, options.variance_points, seed=options.seed)
    except HoldoutSizeError as exc:
        raise _option_error(exc) from None


def _validate(options: CheckOptions) -> None:
    """The options every solver shares, each by its option specification."""
    for core in (TOLERANCE.problem(t) for t in options.tolerances):
        if core is not None:
            raise CheckError(f"--tolerances: {core}")
    if (core := SOLVER_SEEDS.problem(options.solver_seeds)) is not None:
        raise CheckError(f"--solver-seeds: {core}")
    if (core := LADDER_FACTOR.problem(options.ladder_factor)) is not None:
        raise CheckError(f"--ladder-factor: {core}")
    if not (math.isfinite(options.fit_time_budget) and options.fit_time_budget > 0):
        raise CheckError(f"--fit-time-budget: expected a positive number of seconds, got "
                         f"{options.fit_time_budget!r}")
    if options.timing_repeats is not None and (
            core := TIMING_REPEATS.problem(options.timing_repeats)) is not None:
        raise CheckError(f"--timing-repeats: {core}")


def run_check(data: ValidatedData, options: CheckOptions, *, source: str,
              truth: Mapping[str, Any] | None = None,
              progress: Progress | None = None,
              state: CheckState | None = None,
              stopwatch: Stopwatch | None = None) -> CheckResult:
    """Run the whole check (module docstring) on validated data.

    With ``state`` (``harness.check.check_state``) the fit and each finished (solver,
    knob value, seed) audit are saved as they finish, and those saved before are reused,
    not rerun. ``stopwatch`` times the fit evaluations of the frontier
    (``harness.check.solver_timing``; default: the wall clock).
    """
    say: Progress = progress or (lambda _msg: None)
    start = time.perf_counter()
    _validate(options)
    lineup = line_up(options, data.n)
    prepare_solver_children(lined.solver for lined in lineup.solvers)
    several = len(options.solver_names) > 1
    streams = check_streams(options.seed)
    split_rng, fit_rng, probe_rng, growth_rng = (streams[name] for name in CHECK_STREAMS)
    train, hold = split_holdout(data.n, options.holdout, split_rng,
                                cap=options.holdout_points)
    variance_at = variance_subset(hold.size, options)
    x, y = data.points, data.values
    d = x.shape[1]
    template = model_template(options, d)
    notes: list[str] = list(data.notes)
    warnings: list[str] = []
    failed_trials: dict[str, str] = {}
    for lined in lineup.solvers:
        try:
            warnings.extend(trial_before_fit(lined, x, y, options, template, say))
        except SolverFailed as exc:
            if not several:
                raise
            failed_trials[lined.given] = str(exc)
        if lined.isolation is not None:
            trial = ("a trial on a few points before the fit, then "
                     if lined.solver.origin != "builtin" else "")
            notes.append(f"solver {lined.given!r} ran only in child processes: {trial}"
                         "each (knob value, seed) audit, "
                         f"stopped after {lined.isolation.timeout:g} s "
                         f"({lined.isolation.timeout_option})")
    fitted = _fitted(x, y, template, options, d, fit_rng, state, say)
    if not fitted.converged:  # a fixed-parameter check counts as converged
        reason = "; ".join(fitted.fit.notes) if fitted.fit else ""
        warnings.append("the maximum-likelihood fit did not converge"
                        + (f" ({reason})" if reason else "")
                        + ": every verdict was measured at an unconverged estimate, so "
                        "none is called safe")
    kernel, fisher = fitted.kernel, fitted.fisher
    notes.extend(fitted.notes)
    se = standard_errors(kernel, fisher)
    kind, ref_warnings = reference_kind(options, x, kernel)
    first = lineup.solvers[0]
    if kind == "ladder" and (several or not first.knob.is_tol):
        raise CheckError("--reference: the ladder reference runs the solver at tol / "
                         "--ladder-factor, so it needs a single solver whose knob is tol "
                         f"(solver {first.given!r} has {first.knob.name}"
                         + (f"; {len(options.solver_names)} solvers are listed" if several
                            else "") + "); use an exact reference (dense, statespace or "
                         "operator)")
    warnings.extend(ref_warnings)
    if first.isolation is not None and kind == "ladder":
        notes.append(f"the ladder reference runs solver {first.given!r} in this process, "
                     "and so do its audits against it")
    audit_data = AuditData(points=x, y=y, kernel=kernel, mean=options.mean, holdout=hold,
                           fisher=fisher, probes=rademacher(y.size, options.probes, probe_rng),
                           variance_at=variance_at, kl=options.kl)
    say(f"{kind} reference at n = {y.size:,}")
    distributed = options.dask_local is not None or options.scheduler is not None
    if distributed and kind != "operator":
        notes.append(f"--dask-local/--scheduler: the {kind} reference makes no exact-operator "
                     "products, so it ran in this process")
    with dask_client(dask_local=options.dask_local if kind == "operator" else None,
                     scheduler=options.scheduler if kind == "operator" else None) as client:
        reference = build_reference(kind, audit_data, solver=first.solver,
                                    solver_options=first.options, base_seed=options.seed,
                                    memory_budget=options.memory_budget,
                                    ladder_factor=options.ladder_factor,
                                    probes=options.probes, leaf_size=options.leaf_size,
                                    preconditioner=PreconditionerSpec(
                                        family=options.preconditioner), client=client)
    if isinstance(reference, OperatorReference) and not reference.info.certified:
        warnings.append("the exact operator reference is not certified (" +
                        "; ".join(reference.messages) + "): no verdict can be safe")
    growth: dict[str, Any] = {}
    if kind == "ladder":
        growth = subsample_growth(x, y, kernel, options, first.solver, growth_rng, say)
    notes.append(f"reference: {reference.info.description}")
    audits: list[SolverAudit] = []
    for lined in lineup.solvers:
        if lined.given in failed_trials:
            audits.append(SolverAudit(lined=lined, failure=failed_trials[lined.given]))
            continue
        if several:
            say(f"auditing solver {lined.given!r}")
        audit = audit_solver(lined, audit_data, reference, kind, options, fitted, state,
                             notes, say)
        audit = replace(audit, rows=tuple(
            with_growth(r, growth.get("per_tolerance", {}).get(repr(r.tol)))
            for r in audit.rows))
        if audit.result is not None and not audit.result.recommendation.monotone:
            warnings.append((f"solver {lined.given!r}: " if several else "")
                            + "non-monotone tolerance ladder: "
                            + audit.result.recommendation.reason)
        audits.append(audit)
    solver_failures: list[str] = list(failed_trials.values())
    repeats = timing_repeats(options, data.n, len(options.solver_names))
    if repeats:
        audits, failures = _timed(audits, audit_data, options, repeats, stopwatch, say)
        solver_failures += failures
    # what a speed-up is measured against (the ladder: its one solver at tol / factor)
    exact = SPEEDUP_OVER.get(kind, f"{first.solver.name} at tol / {options.ladder_factor:g}")
    exact_seconds = exact_time(kind, audit_data, options, audits, bool(repeats), stopwatch)
    entries, pick = frontier_entries(audits, lineup, exact_seconds=exact_seconds,
                                     exact=exact, repeats=repeats)
    pick = replace(pick, machine=timing_machine())
    primary = next((a for a in audits if pick.recommended is not None
                    and a.lined.given == pick.recommended.solver),
                   next((a for a in audits if a.result is not None), audits[0]))
    if primary.result is None:   # every solver failed its trial
        raise SolverFailed("; ".join(solver_failures))
    return _result(data, options, primary, entries, pick, fitted=fitted, kind=kind,
                   reference=reference, audit_data=audit_data, se=se, growth=growth,
                   train=train, hold=hold, variance_at=variance_at, template=template,
                   notes=notes, warnings=warnings, solver_failures=solver_failures,
                   source=source, truth=truth, start=start, exact=exact, say=say)


def _timed(audits: list[SolverAudit], audit_data: AuditData, options: CheckOptions,
           repeats: int, stopwatch: Stopwatch | None, say: Progress
           ) -> tuple[list[SolverAudit], list[str]]:
    """Every audited solver with its timing (``harness.check.frontier_table.time_solver``:
    in child processes for all when any solver runs in one), and the one-line failures
    of those that failed while timed (their points keep no time)."""
    in_child = any(a.lined.isolation is not None for a in audits)
    timed: list[SolverAudit] = []
    failures: list[str] = []
    for audit in audits:
        if audit.failure:
            timed.append(audit)
            continue
        say(f"timing {repeats} fit evaluations per knob value of {audit.lined.given!r}")
        timings, failure = time_solver(audit, audit_data, options, repeats, stopwatch,
                                       in_child)
        if failure:
            failures.append(failure)
            timings = tuple(PointTiming((), math.nan, 0) for _ in audit.rows)
        timed.append(replace(audit, timings=timings))
    return timed, failures


def _fitted(x: np.ndarray, y: np.ndarray, template: Kernel, options: CheckOptions, d: int,
            rng: np.random.Generator, state: CheckState | None, say: Progress
            ) -> FitOutcome:
    """The estimate (``harness.check.fit_stage``), reused from ``state`` when saved."""
    saved = None if state is None else state.load_fit()
    if state is not None and isinstance(saved, FitOutcome):
        say(f"reusing the saved fit ({saved.info.get('method')}) from {state.folder}")
        return saved
    fitted = (fixed_parameters(x, y, options, d) if options.fixed_params is not None
              else fit_parameters(x, y, template, options, rng, say))
    if state is not None:
        state.save_fit(fitted)
    return fitted


def _result(data: ValidatedData, options: CheckOptions, primary: SolverAudit,
            entries: list[dict[str, Any]], pick: FrontierPick, *, fitted: FitOutcome,
            kind: str, reference: PairedReference | ValueReference, audit_data: AuditData,
            se: Any, growth: dict[str, Any], train: np.ndarray, hold: np.ndarray,
            variance_at: np.ndarray, template: Kernel, notes: list[str], warnings: list[str],
            solver_failures: list[str], source: str, truth: Mapping[str, Any] | None,
            start: float, exact: str, say: Progress) -> CheckResult:
    """The CheckResult: the single-solver keys describe ``primary`` (the recommended
    solver, else the first audited), ``solvers`` and ``frontier`` every solver; then the
    end-to-end refit at the primary's pick."""
    assert primary.result is not None
    lined, rows, rec = primary.lined, list(primary.rows), primary.result.recommendation
    solver, knob = lined.solver, lined.knob
    x, y, kernel, fisher = audit_data.points, audit_data.y, fitted.kernel, fitted.fisher
    holdout_info = _holdout_info(reference, lined.values[-1], y, hold, kernel.nugget,
                                 variance_at)
    holdout_info.update(reference=kind, conditioned_on=int(train.size))
    best = next((r for r in rows if r.value == rec.tol), None)
    refit = None
    if best is not None and best.value is not None and options.refit \
            and fitted.fit is not None:
        say(f"end-to-end refit with {lined.given} {knob.value_text(best.value)}")
        refit_args = (x, y, template, fitted.fit, best.value, options, solver, se.log_se,
                      fisher)
        if lined.isolation is None:
            refit = refit_with_solver(*refit_args)
        else:
            refit, failure = isolated_refit(refit_args, lined.isolation, lined.given,
                                            knob.value_text(best.value))
            solver_failures += [failure] if failure else []
    loglik = (reference.values().loglik.value if isinstance(reference, HasValues)
              else reference.sides(lined.values[-1]).full.loglik)
    if fitted.fit is not None and fitted.fit.engine in ("dense", "statespace"):
        loglik = fitted.fit.loglik            # exact at the estimate
    fit_info = dict(fitted.info)
    distance = _distance_to_exact_mle(fitted, reference)
    if distance is not None:
        fit_info["exact_distance"] = distance.to_dict()
        notes.append(distance.sentence())
        if distance.status == BEYOND:
            warnings.append("the fit's estimate (the Vecchia MLE) is measurably more than "
                            f"{distance.tolerance_se:g} SE from the exact MLE: "
                            + distance.sentence())
    return CheckResult(
        source=source, n=data.n, n_fit=int(y.size), n_holdout=int(hold.size),
        d=int(x.shape[1]), coord_system=data.coord_system, kernel=kernel.family,
        mean=options.mean, params=kernel.natural_params(),
        se={"log": dict(zip(kernel.param_names, se.log_se.tolist(), strict=True)),
            "natural": se.natural_se, "microergodic": se.microergodic,
            "microergodic_se": se.microergodic_se, "nu": se.nu},
        loglik=float(loglik), reference=kind, fit=fit_info, tolerances=tuple(rows),
        recommended_tolerance=rec.tol if knob.is_tol else None,
        recommended_knob=None if rec.tol is None else {"solver": solver.name,
                                                       "name": knob.name, "value": rec.tol},
        knob={"name": knob.name, "range": knob.range_text(),
              "more_accurate": knob.more_accurate, "values": list(lined.values)},
        speedup=None if best is None else best.speedup,
        speedup_over=exact,
        refit=refit, thresholds=options.thresholds.to_dict(), growth=growth,
        holdout=holdout_info, truth=dict(truth) if truth else None,
        seconds=time.perf_counter() - start, notes=tuple(notes),
        solver=solver.to_dict() | {"options": dict(lined.options)},
        solver_seeds=primary.seeds, warnings=tuple(warnings), recommendation=rec.to_dict(),
        fit_converged=fitted.converged, reference_detail=reference.info.to_dict(),
        n_variance_points=int(variance_at.size),
        reference_by_metric=reference_by_metric(reference, audit_data),
        solver_failures=tuple(solver_failures), solvers=tuple(entries),
        frontier=pick.to_dict(),
        score_probes=int(getattr(reference, "probes", options.probes)))


def _distance_to_exact_mle(fitted: FitOutcome, reference: PairedReference | ValueReference
                           ) -> ExactDistance | None:
    """The at-scale fit's distance to the exact MLE from the value reference's exact
    score at the estimate (``harness.check.exact_distance``); None unless the estimate is
    an unrefined Vecchia MLE and the reference gives a finite score with its SE."""
    fit = fitted.fit
    if fit is None or fit.engine != "vecchia" or len(fit.stages) > 1 \
            or not isinstance(reference, HasValues):
        return None
    values = reference.values()
    try:
        return exact_distance(values.score, values.score_se, fitted.fisher,
                              param_names=tuple(fitted.kernel.param_names),
                              tolerance_se=REFINE_TOL_SE, probes=values.score_probes)
    except ValueError:
        return None


def _holdout_info(reference: PairedReference | ValueReference, tol: float, y: np.ndarray,
                  hold: np.ndarray, nugget: float, variance_at: np.ndarray) -> dict[str, Any]:
    """How the reference's kriging predicts the held-out values: the RMSE over every
    held-out point, z^2 and coverage over the variance points (None from a reference
    without kriging)."""
    if isinstance(reference, HasValues):
        values = reference.values()
        mean, variance = values.krige_mean, values.krige_var
    else:
        side = reference.sides(tol).kriging
        mean, variance = side.mean, side.variance
    if mean is None or variance is None:
        return {"points": int(hold.size), "variance_points": int(variance_at.size),
                "rmse": None, "mean_z2": None, "coverage95": None}
    resid = y[hold] - mean
    obs_var = variance + nugget
    at = resid[variance_at]
    return {"points": int(hold.size), "variance_points": int(variance_at.size),
            "rmse": float(np.sqrt(np.mean(resid ** 2))),
            "mean_z2": float(np.mean(at ** 2 / obs_var)),
            "coverage95": float(np.mean(np.abs(at) <= 1.96 * np.sqrt(obs_var)))}


def recommend(rows: list[ToleranceResult]) -> ToleranceResult | None:
    """The engine's rule on check rows: the loosest safe tolerance with no unsafe or
    unresolved tighter one (``harness.audit.engine.recommend``)."""
    rec = audit_engine.recommend({float(r.value): r.status or ("safe" if r.safe else "unsafe")
                                  for r in rows if r.value is not None})
    return next((r for r in rows if r.value == rec.tol), None)


