"""Execute one audit task: data, reference, solver under test, metrics, timings.

Everything is rebuilt on the worker from the task's parameters (no n x n array is ever
shipped): points from the generator and the task's ``points`` stream, the kernel from its
family and parameters, y drawn from the model, then

1. the best available reference (``choose_reference``): dense Cholesky within the memory
   budget; else the state-space (Kalman) likelihood for half-integer Matern kernels on
   1D points; else the Kronecker reference for separable kernels on tensor grids; else
   the tolerance ladder, the solver under test at tol / ladder_factor standing in for
   the truth (recorded as ``reference = "ladder"``). When none is allowed the task is
   skipped with the reason.
2. y = W z, z ~ N(0, I) from the ``sample`` stream, with W the dense reference's Cholesky
   factor; other references cannot apply a square root, so W is then the solver under
   test's factor at ``sample_tol`` (recorded in ``y_source``). The mean coefficients of
   the data-generating model are zero. A data file's value column is used as given.
   Errors compare the solver and the reference on the same y, so how y was drawn does not
   bias them.
3. the solver's factorization, its likelihood, score and trace estimate,
   and the metrics of ``harness.audit.metrics`` at theta_0 and at theta_0 + perturbation.

Timing (``audit_timing``) is a separate job so that the runner can schedule it alone: it
times factor, log det, solve, gradient and the total on white-noise data (their cost does
not depend on the values), then traces the memory of one more factorization.
"""

from __future__ import annotations

import math
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from harness.audit.audit_references import OPERATOR_PRECONDITIONER_TOL
from harness.audit.metrics import (
    FisherError,
    factorization_error,
    kriging_errors,
    microergodic_shift,
    power_norm,
    scalar_error,
    score_errors,
    solve_errors,
    trace_errors,
)
from harness.audit.solver_seeds import seeded_options, solver_seed
from harness.audit.timing import measure_memory, peak_rss, thread_settings, time_phase
from harness.geometry.pointsets import generate, tensor_grid
from harness.grid.cases.cost import estimate_cost
from harness.grid.tasks import Task
from harness.model.evaluation import fisher_standard_errors
from harness.model.json_values import to_jsonable
from harness.model.kernels import Kernel, make_kernel, smoothness

HALF_INTEGER_NU = (0.5, 1.5, 2.5)
#: Central-difference step (log scale) of the observed information when a reference
#: gives no Fisher matrix.
HESSIAN_STEP = 1e-3


class TaskSkipped(Exception):
    """The task cannot be audited as configured (no reference, over budget)."""


class SolverMismatchError(RuntimeError):
    """The worker resolved a different solver version than the task was built for."""


# -- data --------------------------------------------------------------------------------
@dataclass(frozen=True)
class TaskData:
    """Points, held-out points and (when read from a file) observed values."""

    points: np.ndarray
    holdout: np.ndarray
    observed: np.ndarray | None


def build_kernel(task: Task) -> Kernel:
    """The task's kernel (wrapped as the separable product model when asked)."""
    kernel = make_kernel(task.kernel, dict(task.kernel_params))
    if task.separable:
        from harness.references.kronecker import SeparableKernel

        return SeparableKernel(kernel)  # type: ignore[return-value]
    return kernel


def build_data(task: Task, streams: dict[str, np.random.Generator]) -> TaskData:
    """Points of the task and its held-out kriging points (see module docstring)."""
    spec = task.pointset
    if spec.file is not None:
        from harness.check.datafile import read_table

        frame = read_table(spec.file)
        coords = frame[list(spec.columns)].to_numpy(dtype=float)
        values = frame[spec.value_column].to_numpy(dtype=float) if spec.value_column else None
        rows = (np.arange(coords.shape[0]) if task.n >= coords.shape[0]
                else np.sort(streams["points"].choice(coords.shape[0], task.n, replace=False)))
        points = coords[rows]
        low, high = points.min(axis=0), points.max(axis=0)
        holdout = low + (high - low) * streams["holdout"].random((task.holdout, points.shape[1]))
        return TaskData(points=points, holdout=holdout,
                        observed=None if values is None else values[rows])
    options = dict(spec.options)
    if spec.generator == "tensor_grid":
        from harness.grid.cases.case_grid import grid_side

        side = grid_side(task.n, task.d)
        extent = options.get("extent")
        points = tensor_grid((side,) * task.d, extent=extent)
        span = np.asarray(extent if extent is not None else (1.0,) * task.d, dtype=float)
        holdout = span * streams["holdout"].random((task.holdout, task.d))
        return TaskData(points=points, holdout=holdout, observed=None)
    if spec.generator is None:
        raise ValueError(f"point set {spec.name!r} names neither a generator nor a file")
    points = generate(spec.generator, task.n, task.d, rng=streams["points"], **options)
    holdout = generate(spec.generator, task.holdout, task.d, rng=streams["holdout"], **options)
    return TaskData(points=points, holdout=holdout, observed=None)


# -- references --------------------------------------------------------------------------
@dataclass
class Reference:
    """The truth a task compares with, behind one interface.

    ``evaluate(kernel, y)`` gives a ``ModelEvaluation`` record with score and
    Fisher information; ``matvec``, ``solve`` and ``kriging`` are None when the reference
    cannot offer them (the matching metrics are then reported as unavailable).
    """

    kind: str
    evaluate: Callable[[Kernel, np.ndarray], Any]
    matvec: Callable[[np.ndarray], np.ndarray] | None = None
    solve: Callable[[np.ndarray], np.ndarray] | None = None
    apply_sqrt: Callable[[np.ndarray], np.ndarray] | None = None
    kriging: Callable[[np.ndarray, np.ndarray], tuple[np.ndarray, np.ndarray]] | None = None
    description: str = ""
    notes: list[str] = field(default_factory=list)
    #: Uncertainty of the last ``evaluate`` at theta_0: ``loglik_se`` (standard error)
    #: and ``loglik_bound`` (deterministic bound); empty for exact references.
    uncertainty: dict[str, float] = field(default_factory=dict)


def _observed_information(loglik: Callable[[np.ndarray], float], theta: np.ndarray,
                          step: float = HESSIAN_STEP) -> np.ndarray:
    """-Hessian of the log-likelihood by central differences (observed information).

    Diagonal: -(L(t + h e_i) - 2 L(t) + L(t - h e_i)) / h^2; off-diagonal: the four-point
    formula -(L(++) - L(+-) - L(-+) + L(--)) / (4 h^2) (Abramowitz and Stegun 1964,
    eqs. 25.3.23 and 25.3.26).
    """
    p = theta.size
    base = loglik(theta)
    h = np.zeros((p, p))
    for i in range(p):
        e_i = np.eye(p)[i] * step
        h[i, i] = (loglik(theta + e_i) - 2 * base + loglik(theta - e_i)) / step ** 2
        for j in range(i):
            e_j = np.eye(p)[j] * step
            value = (loglik(theta + e_i + e_j) - loglik(theta + e_i - e_j)
                     - loglik(theta - e_i + e_j) + loglik(theta - e_i - e_j)) / (4 * step ** 2)
            h[i, j] = h[j, i] = value
    return -h


def _dense_reference(task: Task, data: TaskData, kernel: Kernel) -> Reference:
    from harness.references import DenseCholesky, dense_evaluate, dense_kriging

    chol = DenseCholesky(data.points, kernel, memory_budget=task.memory_budget)

    def evaluate(model: Kernel, y: np.ndarray) -> Any:
        return dense_evaluate(data.points, y, model, mean=task.mean, reml=task.reml,
                              score=True, fisher=True, memory_budget=None)

    def krige(y: np.ndarray, new: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        pred = dense_kriging(data.points, y, kernel, new, mean=task.mean, factorization=chol)
        return pred.mean, pred.variance

    return Reference(kind="dense", evaluate=evaluate, matvec=chol.matvec, solve=chol.solve,
                     apply_sqrt=chol.apply_sqrt, kriging=krige,
                     description=f"dense Cholesky, certificate {chol.certificate:.3g}")


def _statespace_reference(task: Task, data: TaskData, kernel: Kernel) -> Reference:
    from dataclasses import replace

    from harness.references.statespace import StateSpaceReference

    base = StateSpaceReference(data.points, kernel)

    def evaluate(model: Kernel, y: np.ndarray) -> Any:
        ref = base.with_kernel(model)
        ev = ref.evaluate(y, mean=task.mean, reml=task.reml, score=True)

        def loglik(theta: np.ndarray) -> float:
            return base.with_kernel(model.with_theta(theta)).loglik(y, mean=task.mean,
                                                                      reml=task.reml)
        info = _observed_information(loglik, model.theta)
        return replace(ev, fisher=info, notes=(*ev.notes, "fisher: observed information, "
                                               f"central differences, step {HESSIAN_STEP:g}"))

    return Reference(kind="statespace", evaluate=evaluate,
                     description="Kalman filter (exact); Fisher by observed information",
                     notes=["matvec, solve and kriging not offered by the state-space "
                            "reference: factorization, solve and kriging metrics skipped"])


def _kronecker_reference(task: Task, data: TaskData, kernel: Kernel) -> Reference:
    from harness.references.kronecker import KroneckerReference

    base = KroneckerReference(data.points, kernel)  # type: ignore[arg-type]

    def evaluate(model: Kernel, y: np.ndarray) -> Any:
        ref = base if model is kernel else KroneckerReference(data.points, model)  # type: ignore[arg-type]
        return ref.evaluate(y, mean=task.mean, reml=task.reml, score=True, fisher=True)

    return Reference(kind="kronecker", evaluate=evaluate, matvec=base.matvec, solve=base.solve,
                     description="Kronecker eigen-decomposition (exact)",
                     notes=["kriging not offered by the Kronecker reference: skipped"])


def _ladder_reference(task: Task, data: TaskData, kernel: Kernel, solver: Any,
                      streams: dict[str, np.random.Generator]) -> Reference:
    from harness.likelihood import evaluate_likelihood, kriging

    if task.tol is None:
        raise TaskSkipped("ladder reference needs a tolerance; the solver is exact")
    tol = task.tol / task.ladder_factor
    fact = solver.factorize(data.points, kernel, kernel.theta, tol=tol,
                            **solver_options(task, solver, streams))
    probe_seed = int(streams["probes"].integers(2 ** 63))

    def evaluate(model: Kernel, y: np.ndarray) -> Any:
        f = fact if model is kernel else solver.factorize(
            data.points, kernel, model.theta, tol=tol, **solver_options(task, solver, streams))
        return evaluate_likelihood(f, data.points, y, model, mean=task.mean, reml=task.reml,
                                   score=True, trace=task.trace_method, probes=task.probes,
                                   rng=probe_seed + 1, fisher=True)

    def krige(y: np.ndarray, new: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        pred = kriging(fact, data.points, y, kernel, new, mean=task.mean)
        return pred.mean, pred.variance

    return Reference(kind="ladder", evaluate=evaluate, matvec=fact.matvec, solve=fact.solve,
                     apply_sqrt=fact.apply_sqrt if fact.supports_sqrt else None, kriging=krige,
                     description=f"{task.solver} at tol {tol:.1e} (tol / {task.ladder_factor:g})",
                     notes=["reference is the same solver at a tighter tolerance "
                            "(a stand-in, not exact)"])


def _operator_reference(task: Task, data: TaskData, kernel: Kernel,
                        streams: dict[str, np.random.Generator]) -> Reference:
    """The exact operator (``harness.references.operator``), preconditioned by the built-in
    solver at ``OPERATOR_PRECONDITIONER_TOL``: every value from exact kernel products, with
    its standard error (log det, traces) or bound (quadratic form)."""
    from harness.audit.named_evaluation import build_preconditioner
    from harness.references.operator import operator_evaluate

    probe_seed = int(streams["probes"].integers(2 ** 63))
    uncertainty: dict[str, float] = {}

    def evaluate(model: Kernel, y: np.ndarray) -> Any:
        pre = build_preconditioner("hodlr", data.points, model, tol=OPERATOR_PRECONDITIONER_TOL,
                                   seed=task.seed)
        ev = operator_evaluate(data.points, y, model, mean=task.mean, reml=task.reml,
                               preconditioner=pre, rng=probe_seed, score=True)
        if not ev.converged:
            raise TaskSkipped("operator reference unresolved: " + "; ".join(ev.messages))
        if model is kernel:
            # L = -Q/2 - ...: the quadratic-form bound enters L halved.
            uncertainty.update(loglik_se=ev.loglik_se, loglik_bound=0.5 * ev.quadratic_bound)
        return ev.as_model_evaluation()

    return Reference(kind="operator", evaluate=evaluate,
                     description=("exact operator: tiled kernel products, PCG and Lanczos "
                                  f"quadrature, preconditioned by hodlr at tol "
                                  f"{OPERATOR_PRECONDITIONER_TOL:g}"),
                     notes=["operator reference: log-likelihood with a standard error (its "
                            "column reference_loglik_se); no Fisher information, so score "
                            "metrics and parameter shifts are unavailable"],
                     uncertainty=uncertainty)


def choose_reference(task: Task, data: TaskData, kernel: Kernel, solver: Any,
                     streams: dict[str, np.random.Generator]) -> tuple[Reference, list[str]]:
    """The first reference in ``task.references`` that applies, with why others did not."""
    from harness.linalg.dense_budget import DenseBudgetError, check_dense_budget

    declined: list[str] = []
    n, d = data.points.shape
    nu = smoothness(kernel) if isinstance(kernel, Kernel) else None
    for kind in task.references:
        if kind == "dense":
            try:
                # The Cholesky kept for sampling and matvecs, plus the evaluation's
                # factor, inverse and p Fisher products: p + 3 squares.
                check_dense_budget(n, budget=task.memory_budget, fisher=True,
                                   n_params=kernel.n_params + 1)
            except DenseBudgetError as exc:
                declined.append(f"dense: {exc}")
                continue
            return _dense_reference(task, data, kernel), declined
        if kind == "statespace":
            if d != 1 or nu not in HALF_INTEGER_NU or task.separable:
                declined.append(f"statespace: needs 1D points and a Matern kernel with nu in "
                                f"{HALF_INTEGER_NU} (got d = {d}, {task.kernel})")
                continue
            return _statespace_reference(task, data, kernel), declined
        if kind == "kronecker":
            if not task.separable or task.pointset.generator != "tensor_grid":
                declined.append("kronecker: needs a separable kernel (separable = true) on a "
                                "tensor_grid point set")
                continue
            from harness.references.kronecker import KroneckerError

            try:
                return _kronecker_reference(task, data, kernel), declined
            except KroneckerError as exc:
                declined.append(f"kronecker: {exc}")
                continue
        if kind == "operator":
            return _operator_reference(task, data, kernel, streams), declined
        if kind == "ladder":
            if task.tol is None:
                declined.append("ladder: the solver is exact (no tolerance to tighten)")
                continue
            return _ladder_reference(task, data, kernel, solver, streams), declined
    raise TaskSkipped("no reference available: " + "; ".join(declined))


# -- the accuracy audit ------------------------------------------------------------------
def _resolve(task: Task) -> Any:
    from harness.solvers.registry import resolve_solver

    solver = resolve_solver(task.solver)
    version = str(solver.version) if solver.version is not None else "unknown"
    if version != task.solver_version:
        raise SolverMismatchError(
            f"solver {task.solver!r}: the task was built for version {task.solver_version!r} "
            f"but this worker loads {version!r}; install the same version everywhere")
    return solver


def solver_options(task: Task, solver: Any, streams: dict[str, np.random.Generator]
                   ) -> dict[str, Any]:
    """The factory's options, with the solver's seed ``solver_seed(task.seed, 0)``
    (``harness.audit.solver_seeds``, the same derivation as ``check`` and ``evaluate``)
    under the option the factory declares (``rng`` or ``seed``) when the case does not
    set it, so randomized solvers are reproducible across verbs and every factorization
    of the task uses the same seed."""
    return seeded_options(solver.factory, task.solver_options, solver_seed(task.seed, 0))


def _draw_y(task: Task, data: TaskData, kernel: Kernel, reference: Reference, solver: Any,
            streams: dict[str, np.random.Generator]) -> tuple[np.ndarray, str]:
    if data.observed is not None:
        return data.observed, f"file column {task.pointset.value_column!r}"
    z = np.asarray(streams["sample"].standard_normal(data.points.shape[0]))
    if reference.apply_sqrt is not None and reference.kind == "dense":
        return reference.apply_sqrt(z), "dense Cholesky factor"
    fact = solver.factorize(data.points, kernel, kernel.theta, tol=task.sample_tol,
                            **solver_options(task, solver, streams))
    if not fact.supports_sqrt:
        raise TaskSkipped(f"cannot draw y: the {reference.kind} reference and solver "
                          f"{task.solver!r} offer no square root (apply_sqrt)")
    return fact.apply_sqrt(z), f"{task.solver} factor at tol {task.sample_tol:g}"


def _finite(value: float) -> float | None:
    return float(value) if value is not None and math.isfinite(value) else None


def _check_finite(name: str, value: float, solver: str) -> None:
    if not math.isfinite(value):
        raise FloatingPointError(f"solver {solver!r} returned a non-finite {name}: {value!r}")


def audit_accuracy(task: Task) -> dict[str, Any]:
    """Run the accuracy part of one task; returns the JSON-able result body.

    Raises ``TaskSkipped`` when the task cannot be audited as configured; any other
    exception is a failure of the task.
    """
    from harness.likelihood import evaluate_likelihood, kriging
    from harness.linalg.dense_budget import default_memory_budget

    if task.time_budget is not None:
        budget = task.memory_budget or default_memory_budget()
        cost = estimate_cost(task, dense_limit_bytes=budget)
        if cost.seconds > task.time_budget:
            raise TaskSkipped(f"estimated {cost.seconds:.3g} s exceeds the time budget of "
                              f"{task.time_budget:g} s (budget.time)")
    seconds: dict[str, float] = {}
    clock = time.perf_counter()
    streams = task.streams()
    solver = _resolve(task)
    kernel = build_kernel(task)
    data = build_data(task, streams)
    seconds["data"] = time.perf_counter() - clock

    clock = time.perf_counter()
    reference, declined = choose_reference(task, data, kernel, solver, streams)
    y, y_source = _draw_y(task, data, kernel, reference, solver, streams)
    theta0 = kernel.theta
    ref0 = reference.evaluate(kernel, y)
    seconds["reference"] = time.perf_counter() - clock

    clock = time.perf_counter()
    fact = solver.factorize(data.points, kernel, theta0, tol=task.tol,
                            **solver_options(task, solver, streams))
    seconds["factor"] = time.perf_counter() - clock
    _check_finite("log det", fact.logdet(), task.solver)
    clock = time.perf_counter()
    wants_score = bool({"score", "perturbed", "trace"} & set(task.metrics))
    sol0 = evaluate_likelihood(fact, data.points, y, kernel, mean=task.mean, reml=task.reml,
                               score=wants_score, trace=task.trace_method, probes=task.probes,
                               rng=streams["probes"], fisher=False)
    seconds["evaluate"] = time.perf_counter() - clock
    _check_finite("log-likelihood", sol0.loglik, task.solver)

    metrics: dict[str, Any] = {}
    notes: list[str] = [*reference.notes, *getattr(fact, "notes", ()), *sol0.notes]
    names = kernel.param_names
    if "loglik" in task.metrics:
        metrics.update(scalar_error(sol0.logdet, ref0.logdet).to_dict("logdet"))
        metrics.update(scalar_error(sol0.quadratic, ref0.quadratic).to_dict("quadratic"))
        metrics.update(scalar_error(sol0.loglik, ref0.loglik).to_dict("loglik"))
        metrics["reference_loglik_se"] = float(reference.uncertainty.get("loglik_se", 0.0))
        metrics["reference_loglik_bound"] = float(reference.uncertainty.get("loglik_bound", 0.0))
    shift = None
    if "score" in task.metrics and sol0.score is not None:
        try:
            errs = score_errors(sol0.score, ref0.score, ref0.fisher, names)
            metrics.update(errs.to_dict("score"))
            shift = errs.shift
        except FisherError as exc:
            notes.append(f"score metrics unavailable: {exc}")
        nu = smoothness(kernel) if isinstance(kernel, Kernel) else None
        if shift is not None and nu is not None and "log_lengthscale" in names:
            metrics.update(microergodic_shift(shift, ref0.fisher, names, nu).to_dict())
    if "trace" in task.metrics and sol0.trace_terms is not None:
        # A ladder reference is a solver's ModelEvaluation: its traces are estimated.
        exact_traces = (None if reference.kind == "ladder"
                        else getattr(ref0, "trace_terms", None))
        if exact_traces is not None:
            metrics.update(trace_errors(sol0.trace_terms, exact_traces,
                                        sol0.trace_stderr, names).to_dict())
        else:
            notes.append(f"trace metrics unavailable: the {reference.kind} reference gives "
                         "no exact traces")
    if "perturbed" in task.metrics:
        theta1 = theta0 + task.perturbation
        kernel1 = kernel.with_theta(theta1)
        fact1 = solver.factorize(data.points, kernel, theta1, tol=task.tol,
                                 **solver_options(task, solver, streams))
        sol1 = evaluate_likelihood(fact1, data.points, y, kernel1, mean=task.mean,
                                   reml=task.reml, score=True, trace=task.trace_method,
                                   probes=task.probes, rng=streams["probes"], fisher=False)
        ref1 = reference.evaluate(kernel1, y)
        metrics.update(scalar_error(sol1.loglik, ref1.loglik).to_dict("perturbed_loglik"))
        try:
            if sol1.score is None:
                raise FisherError("the solver returned no score at the perturbed point")
            metrics.update(score_errors(sol1.score, ref1.score, ref1.fisher, names)
                           .to_dict("perturbed_score"))
        except FisherError as exc:
            notes.append(f"perturbed score metrics unavailable: {exc}")
        del fact1
    norm_a = None
    if "factorization" in task.metrics:
        if reference.matvec is not None:
            fe = factorization_error(reference.matvec, fact.matvec, data.points.shape[0],
                                     rng=streams["power"], iterations=task.power_iterations)
            metrics.update(fe.to_dict())
            norm_a = fe.reference_norm
        else:
            notes.append(f"factorization error unavailable: no exact matvec ({reference.kind})")
    if "solve" in task.metrics:
        if reference.matvec is not None:
            x_approx = fact.solve(y)
            x_exact = reference.solve(y) if reference.solve is not None else None
            if norm_a is None:
                norm_a = power_norm(reference.matvec, data.points.shape[0],
                                    rng=streams["power"], iterations=task.power_iterations).value
            metrics.update(solve_errors(x_approx, x_exact, y - reference.matvec(x_approx), y,
                                        norm_a).to_dict())
        else:
            notes.append(f"solve errors unavailable: no exact matvec ({reference.kind})")
    if "kriging" in task.metrics:
        if reference.kriging is not None:
            pred = kriging(fact, data.points, y, kernel, data.holdout, mean=task.mean)
            mean_exact, var_exact = reference.kriging(y, data.holdout)
            metrics.update(kriging_errors(pred.mean, pred.variance, mean_exact, var_exact,
                                          floor=1e-12 * kernel.variance).to_dict())
        else:
            notes.append(f"kriging errors unavailable with the {reference.kind} reference")

    ranks = getattr(fact, "ranks", None)
    return {
        "metrics": to_jsonable(metrics),
        "reference": {"kind": reference.kind, "description": reference.description,
                      "declined": declined, "certificate": _finite(getattr(ref0, "certificate",
                                                                           None) or math.nan),
                      "loglik": ref0.loglik, "score": to_jsonable(ref0.score),
                      "fisher": to_jsonable(ref0.fisher),
                      "standard_errors": to_jsonable(_standard_errors(ref0.fisher)),
                      "notes": list(ref0.notes)},
        "solver": {"name": task.solver, "version": task.solver_version, "tol": task.tol,
                   "loglik": sol0.loglik, "score": to_jsonable(sol0.score),
                   "trace_estimate": to_jsonable(sol0.trace_terms),
                   "trace_stderr": to_jsonable(sol0.trace_stderr),
                   "nbytes": int(fact.nbytes), "ranks": None if callable(ranks) else ranks,
                   "solves": sol0.solves, "matvecs": sol0.matvecs},
        "data": {"n": int(data.points.shape[0]), "d": int(data.points.shape[1]),
                 "y_source": y_source, "theta0": theta0.tolist(), "param_names": list(names),
                 "kernel": kernel.describe()},
        "memory": {"process_peak_rss_bytes": peak_rss()},
        "seconds": seconds,
        "notes": notes,
    }


def _standard_errors(fisher: np.ndarray | None) -> np.ndarray | None:
    if fisher is None:
        return None
    try:
        return fisher_standard_errors(fisher)
    except np.linalg.LinAlgError:
        return None


# -- timing ------------------------------------------------------------------------------
def audit_timing(task: Task) -> dict[str, Any]:
    """Time the solver's phases (module docstring); returns the JSON-able timing body."""
    from harness.likelihood import evaluate_likelihood

    streams = task.streams()
    solver = _resolve(task)
    kernel = build_kernel(task)
    data = build_data(task, streams)
    y = np.asarray(streams["sample"].standard_normal(data.points.shape[0]))
    theta = kernel.theta
    options = solver_options(task, solver, streams)

    def factor() -> Any:
        return solver.factorize(data.points, kernel, theta, tol=task.tol, **options)

    def total() -> Any:
        f = factor()
        return evaluate_likelihood(f, data.points, y, kernel, mean=task.mean, reml=task.reml,
                                   score=True, trace=task.trace_method, probes=task.probes,
                                   rng=0)

    reps = {"repeats": task.repeats, "warmup": task.warmup}
    t_factor, fact = time_phase("factor", factor, **reps)
    t_logdet, _ = time_phase("logdet", fact.logdet, **reps)
    t_solve, _ = time_phase("solve", lambda: fact.solve(y), **reps)
    t_grad, _ = time_phase("gradient", lambda: evaluate_likelihood(
        fact, data.points, y, kernel, mean=task.mean, reml=task.reml, score=True,
        trace=task.trace_method, probes=task.probes, rng=0), **reps)
    t_total, _ = time_phase("total", total, **reps)
    phases = [t_factor, t_logdet, t_solve, t_grad, t_total]
    # Traced after the timed calls, so JIT compilation is not traced (tracemalloc slows
    # allocation-heavy code; its run is not one of the timed samples).
    memory, _ = measure_memory(factor)
    return {"phases": {p.phase: p.to_dict() for p in phases}, "threads": thread_settings(),
            "nbytes": int(fact.nbytes), "memory": memory.to_dict()}
