"""The check of a tolerance ladder on a user's dataset, end to end.

1. Fit the covariance parameters by maximum likelihood on ALL the user's points, by the
   plan of ``harness.check.fit_plan`` (n and the memory budget decide, never a timing):
   the dense exact fit (screened starts, L-BFGS-B, Fisher scoring polish to
   ``score_tol_se`` SE, ``harness.check.fitting``) for n up to ``dense_fit_max_n``
   (default ``fit_plan.DENSE_FIT_MAX_N``) within the memory budget; beyond that the
   at-scale fit (``harness.check.vecchia_fit``): Fisher scoring on the deterministic
   Vecchia likelihood to a Newton-decrement threshold, then at most two steps with the
   exact score toward the exact MLE where the dense score fits the budget. A kernel
   without a compiled form for the Vecchia likelihood falls back to Fisher scoring with
   the compressed solver's stochastic score. ``fit_time_budget`` caps the fit stage.
   Or take the parameters as given (``fixed_params``). A fit that does not converge is
   a top-level warning and every verdict says so.
2. Fisher information at the estimate (the unit of the shift metrics, and the SEs).
3. Reference (``reference``), chosen by the selector that ``run`` uses too
   (``harness.audit.reference_choice``): ``auto`` is the first of dense (within the
   memory budget), statespace (1D points, half-integer Matern), operator (when
   installed) that applies, the ladder with a warning when none does; ``dense``,
   ``statespace`` and ``operator`` ask for one kind; ``ladder`` (the solver at tol /
   ``ladder_factor``) is extra evidence only, verdicts at best unresolved.
4. The audit engine (``harness.audit.engine.audit_tolerances``): every tolerance of the
   solver under test (``solver``: a registry name or ``package.module:factory``, through
   the same registry and plugin adapter as ``run``) on ``solver_seeds`` seeds of its
   randomness (``harness.audit.solver_seeds``); likelihood and score metrics on all n
   points, kriging at a seeded random holdout (default 10%) conditioned on the other
   points (evaluation only); the worst seed decides; the recommendation is the engine's
   rule. Then an end-to-end refit at the recommended tolerance.
"""

from __future__ import annotations

import math
import time
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field, replace
from typing import Any, cast

import numpy as np

from harness.audit import engine as audit_engine
from harness.audit.audit_references import (
    DENSE_CRASH_ADVICE,
    OperatorReference,
    build_reference,
    operator_available,
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
    EngineResult,
    HasValues,
    PairedReference,
    ToleranceAudit,
    ValueReference,
)
from harness.audit.reference_choice import (
    AUTO_ORDER,
    NoReference,
    ReferenceProblem,
    select_reference,
)
from harness.audit.sides import rademacher
from harness.audit.solver_calls import SolverIsolation, call_solver
from harness.audit.solver_seeds import (
    DEFAULT_SOLVER_SEEDS,
    seed_option,
    solver_seed,
    solver_seeds,
)
from harness.audit.solver_trial import trial_solver
from harness.audit.verdict import Thresholds
from harness.check.check_records import CheckResult, MetricValue, RefitResult, ToleranceResult
from harness.check.check_state import CheckState
from harness.check.data_checks import ValidatedData
from harness.check.fisher_steps import DECREMENT_TOL_NAT, fisher_scoring
from harness.check.fit_engines import CompressedEngine, DenseEngine
from harness.check.fit_plan import DENSE_FIT_MAX_N, plan_fit
from harness.check.fit_records import MleFit
from harness.check.fitting import (
    DENSE_SCORE_TOL_SE,
    DataScale,
    data_scale,
    default_bounds,
    default_starts,
    fit_dense,
    fit_mle,
    standard_errors,
)
from harness.check.plugin_guard import solver_isolation, trial_kernel
from harness.check.vecchia_fit import FIT_NEIGHBOURS, REFINE_TOL_SE, fit_at_scale
from harness.infra.child_process import run_stage
from harness.infra.option_specs import (
    LADDER_FACTOR,
    SOLVER_SEEDS,
    TOLERANCE,
    VARIANCE_POINTS,
    OptionError,
)
from harness.linalg.dense_budget import check_dense_budget
from harness.model import design_matrix
from harness.model.kernels import Kernel, make_kernel
from harness.model.power_law import extrapolate, fit_power_law
from harness.references import DenseBudgetError, DenseCholesky, dense_evaluate
from harness.solvers.knobs import KnobSpec
from harness.solvers.plugins import SolverLoadError
from harness.solvers.protocol import Factorization
from harness.solvers.registry import ResolvedSolver, SolverRuntimeError, resolve_solver

DEFAULT_TOLERANCES = (1e-2, 1e-4, 1e-6, 1e-8, 1e-10)
REFERENCE_CHOICES = ("auto", "dense", "statespace", "operator", "ladder")
DEFAULT_FIT_TIME_BUDGET = 600.0
#: Score tolerance (SE units) of the compressed fall-back fit (``_fit``).
COMPRESSED_SCORE_TOL_SE = 1e-2
Progress = Callable[[str], None]
#: What a speedup is measured against, by reference kind (the ladder: the solver itself).
SPEEDUP_OVER = {"dense": "dense", "operator": "the exact operator",
                "statespace": "the Kalman filter"}


@dataclass(frozen=True)
class CheckOptions:
    """Options of a check (CLI ``covaudit check``).

    Attributes
    ----------
    kernel : str
        Family name (``harness.model.kernels.KERNELS``).
    shape : mapping
        Fixed shape parameters (``nu`` for ``matern``, ``alpha`` for rational quadratic).
    anisotropic : bool
        One length scale per coordinate.
    nugget : bool
        Fit a nugget (False: exact interpolation model).
    mean : str
    tolerances : tuple of float
        Compression tolerances of a ``tol`` solver (``--tolerances``); the tightest is
        also the built-in solver's tolerance when the fit needs a compressed solver.
    knob_values : tuple of float or None
        Values of the solver's accuracy knob to audit (``--knob-values``;
        ``harness.solvers.knobs``): for a ``tol`` solver they replace ``tolerances``; for
        another knob None means its declared default sweep.
    holdout : float
        Fraction of points held out for the kriging evaluation, in (0, 0.5].
    holdout_points : int or None
        At most this many held-out points (``--holdout-points``), whatever the fraction;
        None: the default cap, 2,000 (a given cap must be below n).
    variance_points : int
        At most this many held-out points get a kriging variance (``--variance-points``,
        a seeded subset; ``harness.audit.audit_sampling``).
    seed : int
        Base seed of the holdout, probes, pilot subset and the solver's seeds.
    probes : int
        Rademacher probes of the difference-trace estimate.
    fixed_params : mapping or None
        Natural-scale parameters to use instead of fitting.
    start_params : mapping or None
        An extra starting point for the fit (natural scale).
    thresholds : Thresholds
    dense_fit_max_n : int or None
        n above which the at-scale fit runs (None: ``fit_plan.DENSE_FIT_MAX_N``; 0
        forces the at-scale fit).
    pilot_n : int
        Size of the random subset whose dense fit starts the at-scale fit.
    memory_budget : int or None
        Bytes for the dense reference and the dense fit.
    fit_time_budget : float
        Seconds the fit stage may take: past them it stops and reports itself
        unconverged (a cap, never the choice of the fit).
    fit_max_iter, fit_max_steps : int
        L-BFGS-B iterations and Fisher-scoring steps of the fit.
    score_tol_se : float or None
        Stopping tolerance of the fit in SE units (None: 1e-3 for the dense fit's score,
        ``vecchia_fit.REFINE_TOL_SE`` for the at-scale fit's distance to the exact MLE,
        1e-2 for the compressed fall-back).
    subsample_sizes : tuple of int
        Subsample sizes of the growth audit (ladder reference); capped by the budget.
    refit : bool
    leaf_size : int
        Leaf size of the built-in solver.
    solver : str
        Solver under test: registry name or ``package.module:factory``.
    solver_seeds : int
        Seeds of the solver's randomness per tolerance.
    reference : str
        ``auto``, ``dense``, ``statespace``, ``operator`` or ``ladder``.
    ladder_factor : float
        The ladder reference is the solver at tol / ladder_factor.
    solver_timeout : float or None
        Seconds one call into a solver plugin may take in its child process
        (``harness.check.plugin_guard``); None: ``default_solver_timeout(n)``.
    """

    kernel: str = "matern32"
    shape: Mapping[str, float] = field(default_factory=dict)
    anisotropic: bool = False
    nugget: bool = True
    mean: str = "constant"
    tolerances: tuple[float, ...] = DEFAULT_TOLERANCES
    knob_values: tuple[float, ...] | None = None
    holdout: float = 0.1
    holdout_points: int | None = None
    variance_points: int = VARIANCE_POINTS.default
    seed: int = 0
    probes: int = 16
    fixed_params: Mapping[str, Any] | None = None
    start_params: Mapping[str, Any] | None = None
    thresholds: Thresholds = field(default_factory=Thresholds)
    dense_fit_max_n: int | None = None
    pilot_n: int = 1000
    memory_budget: int | None = None
    fit_time_budget: float = DEFAULT_FIT_TIME_BUDGET
    fit_max_iter: int = 200
    fit_max_steps: int = 20
    score_tol_se: float | None = None
    subsample_sizes: tuple[int, ...] = (500, 1000, 2000, 4000)
    refit: bool = True
    leaf_size: int = 128
    solver: str = "hodlr"
    solver_seeds: int = DEFAULT_SOLVER_SEEDS
    reference: str = "auto"
    ladder_factor: float = audit_engine.LADDER_FACTOR
    solver_timeout: float | None = None


class CheckError(ValueError):
    """The check cannot run with these options."""


def _template(options: CheckOptions, d: int) -> Kernel:
    params: dict[str, Any] = dict(options.shape)
    params["lengthscale"] = [1.0] * d if options.anisotropic else 1.0
    params["nugget"] = 1.0 if options.nugget else 0.0
    return make_kernel(options.kernel, params)


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


def _dense_fits(n: int, budget: int | None, *, fisher: bool = False, n_params: int = 0
                ) -> bool:
    try:
        check_dense_budget(n, budget=budget, score=True, fisher=fisher, n_params=n_params)
    except DenseBudgetError:
        return False
    return True


def _solver_options(options: CheckOptions, solver: ResolvedSolver) -> dict[str, Any]:
    return {"leaf_size": options.leaf_size} if solver.name == "hodlr" else {}


def _resolve(options: CheckOptions) -> ResolvedSolver:
    try:
        return resolve_solver(options.solver)
    except SolverLoadError as exc:
        raise CheckError(f"--solver {options.solver!r}: {exc}") from exc


@dataclass(frozen=True)
class _Fit:
    fit: MleFit | None
    kernel: Kernel
    fisher: np.ndarray
    info: dict[str, Any]
    notes: list[str]
    converged: bool


def _start_from_params(template: Kernel, scale: DataScale, options: CheckOptions
                       ) -> np.ndarray:
    """The starting theta ``--param`` asks for: the given values, the others from the
    data's spread as in ``default_starts`` (0.8 of the variance, 0.2 of the diameter,
    0.2 of the variance as nugget)."""
    params: dict[str, Any] = {"variance": 0.8 * scale.variance,
                              "lengthscale": [0.2 * scale.diameter] * len(template.lengthscale)}
    if template.has_nugget:
        params["nugget"] = 0.2 * scale.variance
    given = dict(options.start_params or {})
    params |= dict(options.shape) | given
    theta = make_kernel(options.kernel, params).theta
    if theta.shape != template.theta.shape:
        raise CheckError(f"--param {given}: gives {theta.size} "
                         f"parameters, the model has {template.theta.size} "
                         f"({', '.join(template.param_names)})")
    return theta


def _fit(x: np.ndarray, y: np.ndarray, template: Kernel, options: CheckOptions,
         rng: np.random.Generator, say: Progress) -> _Fit:
    """The MLE of all points and the Fisher information at it (module docstring 1-2)."""
    notes: list[str] = []
    scale = data_scale(x, y, mean=options.mean)
    bounds = default_bounds(template, scale)
    starts = default_starts(template, scale)
    if options.start_params:
        starts.append(_start_from_params(template, scale, options))
    n = y.size
    dense_max_n = (DENSE_FIT_MAX_N if options.dense_fit_max_n is None
                   else options.dense_fit_max_n)
    plan = plan_fit(n, template.n_params, family=template.family,
                    memory_budget=options.memory_budget,
                    time_budget=options.fit_time_budget, dense_max_n=dense_max_n)
    notes.append(f"fit plan: {plan.engine} ({plan.reason})")
    if plan.engine == "dense":
        tol_se = options.score_tol_se or DENSE_SCORE_TOL_SE
        say(f"fitting by dense L-BFGS-B + Fisher scoring at n = {n:,}")
        # in a child process: a native crash in the BLAS is a one-line error, not a death
        fit = run_stage(fit_dense, x, y, template, mean=options.mean, starts=starts,
                        bounds=bounds, memory_budget=options.memory_budget,
                        max_iter=options.fit_max_iter, max_steps=options.fit_max_steps,
                        score_tol_se=tol_se, time_budget=options.fit_time_budget,
                        stage="the dense fit", n=n, advice=DENSE_CRASH_ADVICE)
    elif plan.engine == "vecchia":
        pilot = np.sort(rng.choice(n, size=min(options.pilot_n, n), replace=False))
        say(f"fitting by Fisher scoring on the Vecchia likelihood at n = {n:,}"
            + (" and exact-score refinement" if plan.exact_score_fits else ""))
        fit = run_stage(fit_at_scale, x, y, template, mean=options.mean, starts=starts,
                        bounds=bounds, pilot_index=pilot,
                        exact_score=plan.exact_score_fits,
                        memory_budget=options.memory_budget,
                        time_budget=options.fit_time_budget,
                        max_iter=options.fit_max_iter, max_steps=options.fit_max_steps,
                        refine_tol_se=options.score_tol_se or REFINE_TOL_SE,
                        stage="the at-scale fit", n=n, advice=DENSE_CRASH_ADVICE)
        notes.append(f"fit: {fit.method}; pilot: {fit.stages[0].note}; exact refinement: "
                     f"{fit.refinement}")
        notes.append("Fisher information (SE units of the shift metrics) from the Vecchia "
                     f"approximation with {FIT_NEIGHBOURS} neighbours, not exact")
    else:
        tol_se = options.score_tol_se or COMPRESSED_SCORE_TOL_SE
        tightest = min(options.tolerances)
        pilot = np.sort(rng.choice(n, size=min(options.pilot_n, n), replace=False))
        say(f"pilot fit by dense L-BFGS-B on {pilot.size:,} random points")
        pilot_fit = fit_mle(DenseEngine(x[pilot], y[pilot], template, mean=options.mean),
                            template, starts=starts, bounds=bounds,
                            max_iter=options.fit_max_iter)
        say(f"Fisher scoring at n = {n:,} with hodlr tol {tightest:g}")
        engine = CompressedEngine(x, y, template, mean=options.mean, tol=tightest,
                                  seed=solver_seed(options.seed, 0),
                                  leaf_size=options.leaf_size)
        fit = fisher_scoring(engine, template, pilot_fit.theta, bounds=bounds,
                             max_steps=options.fit_max_steps, step_tol_se=tol_se)
        notes.append(f"fit: dense pilot on {pilot.size:,} random points (loglik "
                     f"{pilot_fit.loglik:.6g}), then Fisher scoring at all n = {n:,} with "
                     f"the compressed solver at tol {tightest:g} (Hutch++ traces, 32 "
                     f"probes) to {tol_se:g} SE")
        notes.append("Fisher information (SE units of the shift metrics) estimated by "
                     f"Hutch++ at tol {tightest:g}, not exact")
    fisher = np.asarray(fit.fisher)
    info = fit.to_dict() | {"plan": plan.to_dict()}
    if fit.bounds_hit:
        notes.append("bounds hit: " + "; ".join(fit.bounds_hit))
    return _Fit(fit, fit.kernel, fisher, info, notes, fit.converged)


def _fixed(x: np.ndarray, y: np.ndarray, options: CheckOptions, d: int) -> _Fit:
    params = dict(options.fixed_params or {})
    kernel = make_kernel(options.kernel, dict(options.shape) | params)
    kernel.check_dimension(d)
    notes: list[str] = []
    if _dense_fits(y.size, options.memory_budget, fisher=True, n_params=kernel.n_params):
        evaluation = run_stage(dense_evaluate, x, y, kernel, mean=options.mean, score=False,
                               fisher=True, certify=False, memory_budget=options.memory_budget,
                               stage="the dense Fisher information", n=int(y.size),
                               advice=DENSE_CRASH_ADVICE)
        fisher = np.asarray(evaluation.fisher)
    else:
        fisher = np.asarray(CompressedEngine(x, y, kernel, mean=options.mean,
                                             tol=min(options.tolerances),
                                             seed=solver_seed(options.seed, 0))(
            kernel.theta, fisher=True).fisher)
        notes.append("Fisher information estimated by Hutch++ at the tightest tolerance")
    return _Fit(None, kernel, fisher, {"method": "fixed (--params)", "engine": None,
                                       "converged": None}, notes, True)


def _reference_kind(options: CheckOptions, points: np.ndarray, kernel: Kernel
                    ) -> tuple[str, list[str]]:
    """The reference kind to use (``harness.audit.reference_choice``, the selector of
    ``run`` too) and warnings about the choice."""
    if options.reference not in REFERENCE_CHOICES:
        raise CheckError(f"--reference {options.reference!r}: choose one of "
                         f"{', '.join(REFERENCE_CHOICES)}")
    n = int(points.shape[0])
    if options.reference == "ladder":
        return "ladder", ["--reference ladder: the ladder is extra evidence only, so no "
                          "verdict can be better than unresolved"]
    problem = ReferenceProblem(n=n, d=int(points.shape[1]), kernel=kernel,
                               memory_budget=options.memory_budget,
                               operator_installed=operator_available())
    allowed = AUTO_ORDER if options.reference == "auto" else (options.reference,)
    try:
        return select_reference(problem, allowed=allowed).kind, []
    except NoReference as exc:
        if options.reference == "dense":
            raise CheckError(f"--reference dense: n = {n:,} is beyond the dense memory "
                             "budget; use --reference auto, operator or ladder, or raise "
                             "--memory-budget") from None
        if options.reference == "operator":
            raise CheckError("--reference operator: the exact operator reference "
                             "(harness.references.operator) is not available in this "
                             "installation yet; use --reference dense (within the "
                             "memory budget) or ladder") from None
        if options.reference != "auto":
            raise CheckError(f"--reference {options.reference}: "
                             + "; ".join(exc.declined)) from None
    return "ladder", [f"n = {n:,} is beyond the dense memory budget and no exact structured "
                      "or operator reference applies: the tolerance ladder is the only "
                      "reference, so no verdict can be better than unresolved"]


def _knob_values(options: CheckOptions, knob: KnobSpec) -> tuple[float, ...]:
    """The knob values to audit, validated (``CheckOptions.knob_values``), loose to tight."""
    if knob.is_tol:
        return tuple(sorted({float(t) for t in options.tolerances}, reverse=True))
    values = knob.default_sweep if options.knob_values is None else options.knob_values
    spec = knob.option_spec()
    for value in values:
        if (core := spec.problem(value)) is not None:
            raise CheckError(f"--knob-values: {core}")
    return knob.sorted_loose_to_tight(values)


def _with_knob_values(options: CheckOptions, knob: KnobSpec) -> CheckOptions:
    """``options`` with ``knob_values`` as the tolerances of a ``tol`` solver."""
    if not knob.is_tol or options.knob_values is None:
        return options
    from dataclasses import replace

    return replace(options, tolerances=tuple(options.knob_values), knob_values=None)


def _row(audit: ToleranceAudit, reference: str) -> ToleranceResult:
    v = audit.verdict
    return ToleranceResult(
        tol=audit.tol, knob_name=audit.knob_name, knob_value=v.tol, safe=v.safe,
        reference=reference,
        metrics=audit.worst_metrics(), seconds=audit.seconds, speedup=audit.speedup,
        nbytes=audit.nbytes, error="; ".join(v.failures), status=v.status,
        reasons=v.reasons, seeds=tuple(s.to_dict() for s in audit.seeds),
        spread={k: s.to_dict() for k, s in v.spread.items()})


def run_check(data: ValidatedData, options: CheckOptions, *, source: str,
              truth: Mapping[str, Any] | None = None,
              progress: Progress | None = None,
              state: CheckState | None = None) -> CheckResult:
    """Run the whole check (module docstring) on validated data.

    With ``state`` (``harness.check.check_state``) the fit and each finished (knob value,
    seed) audit are saved as they finish, and those saved before are reused, not rerun.
    """
    say: Progress = progress or (lambda _msg: None)
    start = time.perf_counter()
    solver = _resolve(options)
    knob = solver.knob
    options = _with_knob_values(options, knob)
    for core in (TOLERANCE.problem(t) for t in options.tolerances):
        if core is not None:
            raise CheckError(f"--tolerances: {core}")
    tols = _knob_values(options, knob)
    if not tols:
        flag = "--tolerances" if knob.is_tol else "--knob-values"
        raise CheckError(f"{flag}: expected at least one {knob.name} value, got none")
    if (core := SOLVER_SEEDS.problem(options.solver_seeds)) is not None:
        raise CheckError(f"--solver-seeds: {core}")
    if (core := LADDER_FACTOR.problem(options.ladder_factor)) is not None:
        raise CheckError(f"--ladder-factor: {core}")
    if not (math.isfinite(options.fit_time_budget) and options.fit_time_budget > 0):
        raise CheckError(f"--fit-time-budget: expected a positive number of seconds, got "
                         f"{options.fit_time_budget!r}")
    try:
        isolation = solver_isolation(solver, data.n, options.solver_timeout)
    except OptionError as exc:
        raise CheckError(str(exc)) from None
    streams = check_streams(options.seed)
    split_rng, fit_rng, probe_rng, growth_rng = (streams[name] for name in CHECK_STREAMS)
    train, hold = split_holdout(data.n, options.holdout, split_rng,
                                cap=options.holdout_points)
    variance_at = variance_subset(hold.size, options)
    x, y = data.points, data.values
    d = x.shape[1]
    template = _template(options, d)
    notes: list[str] = list(data.notes)
    warnings: list[str] = []
    if isolation is not None:
        say(f"trial of solver {solver.name!r} on a few points, before the fit")
        warnings.extend(trial_solver(
            solver, x, y, trial_kernel(options.kernel, options.shape, options.fixed_params,
                                       template, x, y, mean=options.mean),
            tols, _solver_options(options, solver), rng=np.random.default_rng(options.seed),
            seed=solver_seed(options.seed, 0), isolation=isolation))
        notes.append(f"solver {solver.name!r} ran only in child processes: a trial on a "
                     f"few points before the fit, then each (knob value, seed) audit, "
                     f"stopped after {isolation.timeout:g} s ({isolation.timeout_option})")
    saved_fit = None if state is None else state.load_fit()
    if state is not None and isinstance(saved_fit, _Fit):
        fitted = saved_fit
        say(f"reusing the saved fit ({fitted.info.get('method')}) from {state.folder}")
    else:
        fitted = (_fixed(x, y, options, d) if options.fixed_params is not None
                  else _fit(x, y, template, options, fit_rng, say))
        if state is not None:
            state.save_fit(fitted)
    if not fitted.converged:  # a fixed-parameter check counts as converged
        reason = "; ".join(fitted.fit.notes) if fitted.fit else ""
        warnings.append("the maximum-likelihood fit did not converge"
                        + (f" ({reason})" if reason else "")
                        + ": every verdict was measured at an unconverged estimate")
    kernel, fisher = fitted.kernel, fitted.fisher
    notes.extend(fitted.notes)
    se = standard_errors(kernel, fisher)
    kind, ref_warnings = _reference_kind(options, x, kernel)
    if kind == "ladder" and not knob.is_tol:
        raise CheckError(f"--reference: the ladder reference runs the solver at tol / "
                         f"--ladder-factor, and solver {solver.name!r} has no tol (its knob "
                         f"is {knob.name}); use an exact reference (dense, statespace or "
                         "operator)")
    warnings.extend(ref_warnings)
    if isolation is not None and kind == "ladder":
        notes.append(f"the ladder reference runs solver {solver.name!r} in this process, "
                     "and so do its audits against it")
    audit_data = AuditData(points=x, y=y, kernel=kernel, mean=options.mean, holdout=hold,
                           fisher=fisher, probes=rademacher(y.size, options.probes, probe_rng),
                           variance_at=variance_at)
    solver_options = _solver_options(options, solver)
    seeds = solver_seeds(options.seed, options.solver_seeds)
    if seed_option(solver.factory) is None:
        notes.append(f"solver {solver.name!r} declares no rng or seed option: treated as "
                     "deterministic, audited on one seed (more would repeat it)")
        seeds = seeds[:1]
    growth: dict[str, Any] = {}
    say(f"{kind} reference at n = {y.size:,}")
    reference = build_reference(kind, audit_data, solver=solver, solver_options=solver_options,
                                base_seed=options.seed, memory_budget=options.memory_budget,
                                ladder_factor=options.ladder_factor, probes=options.probes,
                                leaf_size=options.leaf_size)
    speedup_over = SPEEDUP_OVER.get(kind, f"{solver.name} at tol / {options.ladder_factor:g}")
    if isinstance(reference, OperatorReference) and not reference.info.certified:
        warnings.append("the exact operator reference is not certified (" +
                        "; ".join(reference.messages) + "): no verdict can be safe")
    if kind == "ladder":
        growth = _growth(x, y, kernel, options, solver, growth_rng, say)
    notes.append(f"reference: {reference.info.description}")
    if state is not None and (reused := state.saved_units(tols, seeds))[1]:
        say(f"reusing {reused[0]} of {len(tols)} knob values ({reused[1]} of "
            f"{len(tols) * len(seeds)} (knob value, seed) audits) from {state.folder}")
    result: EngineResult = audit_engine.audit_tolerances(
        audit_data, solver, tols, reference, seeds=seeds, solver_options=solver_options,
        thresholds=options.thresholds, fit_converged=fitted.converged, progress=say,
        isolation=None if kind == "ladder" else isolation, saved=state)
    rows = [_row(a, kind) for a in result.tolerances]
    rows = [_with_growth(r, growth.get("per_tolerance", {}).get(repr(r.tol))) for r in rows]
    rec = result.recommendation
    if not rec.monotone:
        warnings.append("non-monotone tolerance ladder: " + rec.reason)
    holdout_info = _holdout_info(reference, tols[-1], y, hold, kernel.nugget, variance_at)
    holdout_info.update(reference=kind, conditioned_on=int(train.size))
    best = next((r for r in rows if r.value == rec.tol), None)
    refit = None
    solver_failures: list[str] = []
    if best is not None and best.value is not None and options.refit \
            and fitted.fit is not None:
        say(f"end-to-end refit with {solver.name} {knob.value_text(best.value)}")
        refit_args = (x, y, template, fitted.fit, best.value, options, solver, se.log_se,
                      fisher)
        if isolation is None:
            refit = _refit(*refit_args)
        else:
            refit, failure = _isolated_refit(refit_args, isolation, solver.name,
                                             knob.value_text(best.value))
            solver_failures += [failure] if failure else []
    loglik = (reference.values().loglik.value if isinstance(reference, HasValues)
              else reference.sides(tols[-1]).full.loglik)
    if fitted.fit is not None and fitted.fit.engine == "dense":
        loglik = fitted.fit.loglik
    return CheckResult(
        source=source, n=data.n, n_fit=int(y.size), n_holdout=int(hold.size), d=d,
        coord_system=data.coord_system, kernel=kernel.family, mean=options.mean,
        params=kernel.natural_params(),
        se={"log": dict(zip(kernel.param_names, se.log_se.tolist(), strict=True)),
            "natural": se.natural_se, "microergodic": se.microergodic,
            "microergodic_se": se.microergodic_se, "nu": se.nu},
        loglik=float(loglik), reference=kind, fit=fitted.info, tolerances=tuple(rows),
        recommended_tolerance=rec.tol if knob.is_tol else None,
        recommended_knob=None if rec.tol is None else {"solver": solver.name,
                                                       "name": knob.name, "value": rec.tol},
        knob={"name": knob.name, "range": knob.range_text(),
              "more_accurate": knob.more_accurate, "values": list(tols)},
        speedup=None if best is None else best.speedup, speedup_over=speedup_over,
        refit=refit, thresholds=options.thresholds.to_dict(), growth=growth,
        holdout=holdout_info, truth=dict(truth) if truth else None,
        seconds=time.perf_counter() - start, notes=tuple(notes),
        solver=solver.to_dict() | {"options": dict(solver_options)},
        solver_seeds=seeds, warnings=tuple(warnings), recommendation=rec.to_dict(),
        fit_converged=fitted.converged, reference_detail=reference.info.to_dict(),
        n_variance_points=int(variance_at.size),
        reference_by_metric=reference_by_metric(reference, audit_data),
        solver_failures=tuple(solver_failures))


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


def _growth(x: np.ndarray, y: np.ndarray, kernel: Kernel, options: CheckOptions,
            solver: ResolvedSolver, rng: np.random.Generator, say: Progress
            ) -> dict[str, Any]:
    """Dense audits of |L~ - L| on nested random subsamples, power law fitted in n
    (extra evidence of the ladder reference, information only)."""
    n = y.size
    sizes = [m for m in options.subsample_sizes
             if m < n and _dense_fits(m, options.memory_budget)]
    if len(sizes) < 3:
        return {"sizes": sizes, "note": "fewer than 3 subsample sizes fit the budget; "
                                        "no growth fit"}
    perm = rng.permutation(n)
    errors: dict[float, list[float]] = {tol: [] for tol in options.tolerances}
    opts = _solver_options(options, solver)
    from harness.audit.solver_seeds import seeded_options

    opts = seeded_options(solver.factory, opts, solver_seed(options.seed, 0))
    for m in sizes:
        idx = np.sort(perm[:m])
        say(f"subsample audit at m = {m:,}")
        chol = DenseCholesky(x[idx], kernel, memory_budget=options.memory_budget)
        design = design_matrix(x[idx], options.mean)
        ref = evaluate_loglik(chol, y[idx], design)
        for tol in options.tolerances:
            try:
                fac = solver.factorize(x[idx], kernel, kernel.theta, tol=tol, **opts)
                errors[tol].append(abs(evaluate_loglik(fac, y[idx], design) - ref))
            except (SolverRuntimeError, np.linalg.LinAlgError):
                errors[tol].append(math.inf)
    out: dict[str, Any] = {"sizes": sizes, "n_target": n, "per_tolerance": {}}
    for tol, errs in errors.items():
        e = np.asarray(errs)
        entry: dict[str, Any] = {"errors": [float(v) for v in e]}
        if np.all(np.isfinite(e)):
            # |dL| ~ a m^b over the subsample sizes, extrapolated to n with its 95%
            # prediction interval (the project's one power-law fit).
            fit = fit_power_law(sizes, np.maximum(e, 1e-14), level=0.95)
            at_n = extrapolate(fit, n)
            entry.update({"slope": fit.slope, "extrapolated": at_n.value,
                          "upper95": at_n.high, "lower95": at_n.low})
        out["per_tolerance"][repr(tol)] = entry
    return out


def evaluate_loglik(fac: Factorization, y: np.ndarray, design: np.ndarray) -> float:
    """GLS profile log-likelihood through a factorization."""
    from harness.likelihood.whitening import fit_mean

    return float(fit_mean(fac, y, design, float(fac.logdet()))[0].loglik)


def _with_growth(row: ToleranceResult, entry: Mapping[str, Any] | None) -> ToleranceResult:
    """Add the extrapolated log-likelihood error (information: the ladder is never the
    sole basis of safe)."""
    if not entry or "upper95" not in entry:
        return row
    metric = MetricValue("loglik_error_extrapolated", float(entry["upper95"]),
                         note=f"upper 95% bound of |L~ - L| extrapolated to full n "
                              f"(fitted slope {entry['slope']:.2f} in log n; information)")
    from dataclasses import replace

    return replace(row, metrics=(*row.metrics, metric))


def recommend(rows: list[ToleranceResult]) -> ToleranceResult | None:
    """The engine's rule on check rows: the loosest safe tolerance with no unsafe or
    unresolved tighter one (``harness.audit.engine.recommend``)."""
    rec = audit_engine.recommend({float(r.value): r.status or ("safe" if r.safe else "unsafe")
                                  for r in rows if r.value is not None})
    return next((r for r in rows if r.value == rec.tol), None)


def _isolated_refit(arguments: tuple[Any, ...], isolation: SolverIsolation, name: str,
                    at: str) -> tuple[RefitResult | None, str]:
    """``_refit(*arguments)`` in a child process (``harness.audit.solver_calls``): one
    call of at most ``fit_max_steps + 1`` times the solver's time limit, as the refit
    evaluates the likelihood at every Fisher-scoring step. Returns the refit, or None and
    the one-line failure of a solver that crashed, hung or raised."""
    options: CheckOptions = arguments[5]
    limit = (None if isolation.timeout is None
             else isolation.timeout * (options.fit_max_steps + 1))
    call = call_solver(_refit, *arguments, isolation=replace(isolation, timeout=limit),
                       who=f"solver {name!r}",
                       where=f"in the refit at {at} (n = {arguments[1].size:,})")
    if call.failure:
        return None, call.failure
    return call.value, ""


def _refit(x: np.ndarray, y: np.ndarray, template: Kernel, fit: MleFit, tol: float,
           options: CheckOptions, solver: ResolvedSolver, log_se: np.ndarray,
           fisher: np.ndarray) -> RefitResult:
    """Fisher scoring with the solver under test at ``tol`` (the value of its knob, which
    reaches the factory as ``harness.solvers.knobs.KnobSpec.arguments`` says) from the
    reference estimate."""
    knob = solver.knob
    arguments = knob.arguments(tol)
    # the engine hands ``tol`` on to the factory, whose protocol takes None for a solver
    # whose knob is not tol
    engine = CompressedEngine(x, y, template, mean=options.mean,
                              tol=cast(float, arguments.pop("tol")),
                              seed=solver_seed(options.seed, 0), leaf_size=options.leaf_size,
                              solver=solver,
                              options=_solver_options(options, solver) | arguments)
    start_ll = engine(fit.theta).loglik
    # the fit's own scoring routine: the Newton-decrement stop for a deterministic
    # solver, the score's noise floor for a stochastic one (harness.check.fisher_steps)
    refit = fisher_scoring(engine, template, fit.theta, bounds=fit.bounds, step_tol_se=1e-3,
                           decrement_tol=DECREMENT_TOL_NAT, max_steps=options.fit_max_steps)
    delta = refit.theta - fit.theta
    shift = delta / log_se
    micro = None
    from harness.model.kernels import smoothness

    nu = smoothness(template)
    if nu is not None and template.isotropic:
        a = np.zeros(template.n_params)
        a[0], a[1] = 1.0, -2.0 * nu
        micro = float(a @ delta) / math.sqrt(float(a @ np.linalg.solve(fisher, a)))
    if refit.accepted_steps == 0:
        note = ("the refit accepted no step: " + (refit.starts[0].message if refit.notes
                                                  else "the start already met the score "
                                                       "tolerance")
                + "; the shift is 0 by construction, not a measurement of compression")
    elif not refit.converged:
        note = "the refit did not converge: " + refit.starts[0].message
    else:
        note = refit.starts[0].message
    return RefitResult(tol=tol if knob.is_tol else None, knob_name=knob.name, knob_value=tol,
                       params=refit.kernel.natural_params(),
                       shift_se=dict(zip(template.param_names, shift.tolist(), strict=True)),
                       max_shift_se=float(np.max(np.abs(shift))),
                       loglik_change=float(refit.loglik - start_ll),
                       microergodic_shift_se=micro, evaluations=refit.evaluations,
                       seconds=refit.seconds, accepted_steps=refit.accepted_steps,
                       converged=refit.converged, note=note)
