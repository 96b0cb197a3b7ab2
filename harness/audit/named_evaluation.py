"""One model evaluation by a named reference or solver, as the CLI's ``evaluate`` needs it.

Exact references (``dense``, ``statespace``, ``kronecker``) return their own exact
record; compressed solvers and plugins go through the generic likelihood code with a
trace estimator. Both end in the same ``SolverOutcome``. ``operator`` is the
exact-operator reference (``harness.references.operator``), preconditioned by a solver
resolved by name (``build_preconditioner``); its values carry SEs and bounds in ``extra``.
"""

from __future__ import annotations

import time
from collections.abc import Iterator, Mapping
from contextlib import contextmanager
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from harness.audit.solver_seeds import seeded_options, solver_seed
from harness.likelihood import TRACE_CHOICES, evaluate_likelihood
from harness.likelihood.traces import ExactTraceSizeError
from harness.model import ModelEvaluation
from harness.model.kernels import Kernel
from harness.references import (
    KroneckerReference,
    SeparableKernel,
    StateSpaceReference,
    dense_evaluate,
)
from harness.solvers.fallback import SolverOutputError, SolverProtocolError
from harness.solvers.plugins import SolverLoadError
from harness.solvers.protocol import Factorization
from harness.solvers.registry import SolverRuntimeError, resolve_solver


class EvaluationError(ValueError):
    """The requested solver cannot evaluate this model (wrong geometry, kernel, option)."""


class SolverEvaluationError(EvaluationError):
    """The solver under test (or the plugin preconditioning the operator) raised or
    returned unusable output: a failed solver, exit code 3 (``harness.infra.exit_codes``)."""


@dataclass(frozen=True)
class SolverOptions:
    """Options of ``covaudit evaluate`` that reach the solver."""

    tol: float = 1e-8
    #: The value of a solver's knob other than ``tol`` (``--knob-value``; None: the
    #: factory's own default). A ``tol`` solver takes ``tol``.
    knob_value: float | None = None
    leaf_size: int = 128
    trace: str | None = None
    probes: int = 64
    seed: int = 0
    separable: bool = False
    memory_budget: int | None = None
    preconditioner: str = "hodlr"
    preconditioner_tol: float = 1e-8
    #: ``--preconditioner vecchia``: its neighbour count m (None: chosen by a pilot,
    #: ``harness.audit.operator_preconditioner.pilot_neighbours``).
    preconditioner_neighbours: int | None = None
    se_target: float = 0.02
    dask_local: int | None = None
    scheduler: str | None = None


@dataclass(frozen=True)
class SolverOutcome:
    """What one evaluation produced, whichever path produced it."""

    solver: str
    reference: str
    loglik: float
    logdet: float
    quadratic: float
    beta: np.ndarray
    score: np.ndarray | None
    fisher: np.ndarray | None
    certificate: float | None
    seconds: Mapping[str, float]
    notes: tuple[str, ...] = ()
    extra: Mapping[str, Any] = field(default_factory=dict)


def _from_reference(solver: str, ev: ModelEvaluation) -> SolverOutcome:
    return SolverOutcome(solver=solver, reference=ev.source, loglik=ev.loglik,
                         logdet=ev.logdet, quadratic=ev.quadratic, beta=ev.beta, score=ev.score,
                         fisher=ev.fisher, certificate=ev.certificate, seconds=ev.seconds,
                         notes=ev.notes)


def evaluate_with_solver(solver: str, points: np.ndarray, y: np.ndarray, kernel: Kernel, *,
                         mean: str, reml: bool, score: bool, fisher: bool,
                         options: SolverOptions) -> SolverOutcome:
    """Evaluate L (and score, Fisher) at the kernel's parameters with ``solver``."""
    if options.separable and solver not in ("kronecker", "dense"):
        raise EvaluationError(
            f"--separable is supported with --solver kronecker or dense, not {solver!r}")
    if solver == "dense":
        model: Any = SeparableKernel(kernel) if options.separable else kernel
        ev = dense_evaluate(points, y, model, mean=mean, reml=reml, score=score,
                            fisher=fisher, memory_budget=options.memory_budget)
        return _from_reference(solver, ev)
    if solver == "statespace":
        statespace = StateSpaceReference(points, kernel)
        if fisher:
            raise EvaluationError("--fisher is not available with --solver statespace; "
                                  "use --solver dense at moderate n")
        return _from_reference(solver, statespace.evaluate(y, mean=mean, reml=reml,
                                                           score=score))
    if solver == "kronecker":
        if not options.separable:
            raise EvaluationError(
                "--solver kronecker evaluates separable (product) kernels only; add --separable "
                "(a product of 1D kernels is a different model from the isotropic kernel)")
        reference = KroneckerReference(points, SeparableKernel(kernel))
        return _from_reference(solver, reference.evaluate(y, mean=mean, reml=reml, score=score,
                                                          fisher=fisher))
    if solver == "operator":
        return _operator(points, y, kernel, mean=mean, reml=reml, score=score, fisher=fisher,
                         options=options)
    return _compressed(solver, points, y, kernel, mean=mean, reml=reml, score=score,
                       fisher=fisher, options=options)


def _compressed(solver: str, points: np.ndarray, y: np.ndarray, kernel: Kernel, *, mean: str,
                reml: bool, score: bool, fisher: bool, options: SolverOptions) -> SolverOutcome:
    """The built-in HODLR solver or a plugin, through the generic likelihood code."""
    try:
        resolved = resolve_solver(solver)
    except SolverLoadError as exc:
        raise EvaluationError(str(exc)) from exc
    trace = options.trace or "hutchpp"
    if trace not in TRACE_CHOICES:
        raise EvaluationError(f"--trace {trace!r}: choose one of {', '.join(TRACE_CHOICES)}")
    streams = np.random.default_rng(options.seed).spawn(2)
    factor_options: dict[str, Any] = {}
    if resolved.name == "hodlr":
        factor_options = {"leaf_size": options.leaf_size}
    # The solver's seed is derived as in check and run (harness.audit.solver_seeds).
    factor_options = seeded_options(resolved.factory, factor_options,
                                    solver_seed(options.seed, 0))
    knob = resolved.knob
    knob_value = options.tol if knob.is_tol else options.knob_value
    knob_arguments = ({"tol": None} if knob_value is None
                      else knob.arguments(knob_value))
    start = time.perf_counter()
    try:
        factorization = resolved.factorize(points, kernel, kernel.theta,
                                           **factor_options | knob_arguments)
        seconds_factor = time.perf_counter() - start
        ev = evaluate_likelihood(factorization, points, y, kernel, mean=mean, reml=reml,
                                 score=score, trace=trace, probes=options.probes,
                                 rng=streams[1], fisher=fisher)
    except ExactTraceSizeError as exc:
        raise EvaluationError(str(exc)) from exc
    except (SolverRuntimeError, SolverOutputError, SolverProtocolError) as exc:
        raise SolverEvaluationError(str(exc)) from exc
    seconds = {"factor": seconds_factor, **ev.seconds}
    trace_info: dict[str, Any] | None = None
    if ev.score is not None and ev.trace_terms is not None and ev.trace_stderr is not None:
        trace_info = {
            "method": ev.trace_method, "probes": ev.probes, "solves": ev.solves,
            "matvecs": ev.matvecs,
            "estimate": dict(zip(kernel.param_names, map(float, ev.trace_terms),
                                 strict=True)),
            "stderr": dict(zip(kernel.param_names, map(float, ev.trace_stderr), strict=True)),
        }
    notes = ev.notes if knob_value is not None else (
        *ev.notes, f"solver {resolved.name!r} ran at its own default {knob.name} (no "
                   "--knob-value given)")
    extra = {"tol": options.tol if knob.is_tol else None, "knob_name": knob.name,
             "knob_value": knob_value, "trace": trace_info,
             "nbytes": int(factorization.nbytes),
             "ranks": factorization.ranks, "solver_info": resolved.to_dict()}
    return SolverOutcome(solver=resolved.name, reference="none", loglik=ev.loglik,
                         logdet=ev.logdet, quadratic=ev.quadratic, beta=ev.beta,
                         score=ev.score, fisher=ev.fisher, certificate=None, seconds=seconds,
                         notes=tuple(notes), extra=extra)


def build_preconditioner(name: str, points: np.ndarray, kernel: Kernel, *, tol: float,
                         seed: int = 0, leaf_size: int = 128) -> Factorization:
    """Factor Sigma with the solver ``name`` (``resolve_solver``) for use as the operator
    reference's preconditioner; its seed is derived as for the solver under test."""
    try:
        resolved = resolve_solver(name)
    except SolverLoadError as exc:
        raise EvaluationError(f"--preconditioner: {exc}") from exc
    factor_options: dict[str, Any] = {"leaf_size": leaf_size} if resolved.name == "hodlr" else {}
    factor_options = seeded_options(resolved.factory, factor_options, solver_seed(seed, 0))
    try:
        return resolved.factorize(points, kernel, kernel.theta, tol=tol, **factor_options)
    except (SolverRuntimeError, SolverOutputError, SolverProtocolError) as exc:
        raise SolverEvaluationError(f"--preconditioner {name!r}: {exc}") from exc


def _operator_preconditioner(points: np.ndarray, kernel: Kernel, options: SolverOptions
                             ) -> tuple[Factorization, dict[str, Any]]:
    """The operator's preconditioner and what to report of it: ``vecchia`` through
    ``harness.audit.operator_preconditioner`` (m from ``--preconditioner-neighbours`` or
    the pilot; the record adds family, knob, knob_value and the pilot table), any other
    name through ``build_preconditioner`` at ``--preconditioner-tol``."""
    from harness.audit.operator_preconditioner import (
        PreconditionerSpec,
        build_operator_preconditioner,
    )
    from harness.solvers.vecchia import VecchiaInputError

    if options.preconditioner != "vecchia":
        if options.preconditioner_neighbours is not None:
            raise EvaluationError("--preconditioner-neighbours applies to --preconditioner "
                                  f"vecchia only, not {options.preconditioner!r}")
        pre = build_preconditioner(options.preconditioner, points, kernel,
                                   tol=options.preconditioner_tol, seed=options.seed,
                                   leaf_size=options.leaf_size)
        return pre, {}
    try:
        spec = PreconditionerSpec(family="vecchia", knob=options.preconditioner_neighbours)
        built = build_operator_preconditioner(
            points, kernel, spec, rng=np.random.default_rng(solver_seed(options.seed, 0)),
            hodlr_fallback=False)
    except VecchiaInputError as exc:
        raise EvaluationError(f"--preconditioner vecchia: {exc}") from None
    record = built.to_dict()
    record.pop("seconds")
    return built.factorization, record


@contextmanager
def dask_client(*, dask_local: int | None, scheduler: str | None) -> Iterator[object | None]:
    """A Dask client for ``--dask-local N`` (a LocalCluster) or ``--scheduler ADDR``."""
    if dask_local is not None and scheduler is not None:
        raise EvaluationError("choose one of --dask-local and --scheduler")
    if dask_local is None and scheduler is None:
        yield None
        return
    try:
        from dask.distributed import Client, LocalCluster
    except ImportError as exc:
        raise EvaluationError("--dask-local/--scheduler need dask[distributed] "
                              "(pip install 'covaudit[dask]')") from exc
    if scheduler is not None:
        with Client(scheduler) as client:
            yield client
        return
    with LocalCluster(n_workers=int(dask_local), threads_per_worker=1,  # type: ignore[arg-type]
                      dashboard_address=None) as cluster, Client(cluster) as client:
        yield client


def _operator(points: np.ndarray, y: np.ndarray, kernel: Kernel, *, mean: str, reml: bool,
              score: bool, fisher: bool, options: SolverOptions) -> SolverOutcome:
    """The exact-operator reference, preconditioned by ``options.preconditioner``."""
    from harness.references.operator import operator_evaluate

    if fisher:
        raise EvaluationError("--fisher is not available with --solver operator "
                              "(it would need O(p^2) probe solves); use --solver dense at "
                              "moderate n")
    start = time.perf_counter()
    pre, chosen = _operator_preconditioner(points, kernel, options)
    seconds_pre = time.perf_counter() - start
    rng = np.random.default_rng(options.seed).spawn(2)[1]
    with dask_client(dask_local=options.dask_local, scheduler=options.scheduler) as client:
        ev = operator_evaluate(points, y, kernel, mean=mean, reml=reml, preconditioner=pre,
                               rng=rng, se_target=options.se_target,
                               max_probes=options.probes, score=score,
                               memory_budget=options.memory_budget, client=client)
    names = kernel.param_names

    def by_name(values: np.ndarray | None) -> dict[str, float] | None:
        return None if values is None else dict(zip(names, map(float, values), strict=True))

    extra = {
        "loglik_se": ev.loglik_se, "logdet_se": ev.logdet_se,
        "quadratic_bound": ev.quadratic_bound, "bound_kind": ev.bound_kind,
        "score_se": by_name(ev.score_se), "trace_terms": by_name(ev.trace_terms),
        "trace_se": by_name(ev.trace_se), "iterations": ev.iterations,
        "products": ev.products, "probes": ev.probes, "converged": ev.converged,
        "se_target": options.se_target,
        "preconditioner": {"name": options.preconditioner, "tol": options.preconditioner_tol,
                           "logdet": ev.preconditioner_logdet,
                           "nbytes": int(pre.nbytes), **chosen},
        "dask": ("local" if options.dask_local is not None else options.scheduler),
    }
    seconds = {"preconditioner": seconds_pre, **ev.phases}
    return SolverOutcome(solver="operator", reference="operator", loglik=ev.loglik,
                         logdet=ev.logdet, quadratic=ev.quadratic, beta=ev.beta,
                         score=ev.score, fisher=None, certificate=None, seconds=seconds,
                         notes=ev.messages, extra=extra)
