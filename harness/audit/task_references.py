"""The references of a grid task's detailed metrics, behind one interface (``Reference``).

Where the engine's judged metrics need a reference's sides or values
(``harness.audit.audit_references``), a grid task's detailed metric groups
(``harness.audit.task_metrics``: log det, quadratic form, score, traces, the perturbed
point, factorization, solve, kriging at new points) need a reference that evaluates the
model at any parameters, and, where it can, Sigma products, solves, a square root and
kriging. ``task_reference`` builds the kind that ``harness.audit.reference_choice`` chose:

* dense: the certified dense Cholesky (in the task's worker process, which is the crash
  boundary of ``run``);
* statespace: the Kalman filter, Fisher information by central differences;
* kronecker: the Kronecker eigen-decomposition;
* operator: the exact operator, preconditioned by the built-in HODLR solver;
* ladder: the solver under test at tol / ladder_factor.

``draw_y`` draws y = W z from the dense factor when there is one, else from the solver
under test at ``sample_tol``; a data file's value column is used as given.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field, replace
from typing import Any

import numpy as np

from harness.audit.solver_seeds import seeded_options, solver_seed
from harness.audit.task_protocol import AuditTask
from harness.model.kernels import Kernel

#: Central-difference step (log scale) of the observed information when a reference
#: gives no Fisher matrix.
HESSIAN_STEP = 1e-3


class TaskSkipped(Exception):
    """The task cannot be audited as configured (no reference, over budget)."""


@dataclass
class Reference:
    """The truth a task's detailed metrics compare with.

    ``evaluate(kernel, y)`` gives a ``ModelEvaluation`` record with score and Fisher
    information; ``matvec``, ``solve`` and ``kriging`` are None when the reference cannot
    offer them (the matching metrics are then reported as unavailable).
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


def task_solver_options(task: AuditTask, solver: Any) -> dict[str, Any]:
    """The factory's options with the solver's seed ``solver_seed(task.seed, 0)``
    (``harness.audit.solver_seeds``, the same derivation as ``check`` and ``evaluate``)
    under the option the factory declares, when the case does not set it, and, for a
    solver whose knob is not ``tol``, the knob's value under its name (``rho``; the
    task's ``tol`` is then None, ``harness.solvers.knobs.KnobSpec.arguments``)."""
    options = seeded_options(solver.factory, task.solver_options, solver_seed(task.seed, 0))
    if task.knob_name != "tol" and task.knob_value is not None:
        options[task.knob_name] = float(task.knob_value)
    return options


def observed_information(loglik: Callable[[np.ndarray], float], theta: np.ndarray,
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


def _dense(task: AuditTask, points: np.ndarray, kernel: Kernel) -> Reference:
    from harness.references import DenseCholesky, dense_evaluate, dense_kriging

    chol = DenseCholesky(points, kernel, memory_budget=task.memory_budget)

    def evaluate(model: Kernel, y: np.ndarray) -> Any:
        return dense_evaluate(points, y, model, mean=task.mean, reml=task.reml,
                              score=True, fisher=True, memory_budget=None)

    def krige(y: np.ndarray, new: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        pred = dense_kriging(points, y, kernel, new, mean=task.mean, factorization=chol)
        return pred.mean, pred.variance

    return Reference(kind="dense", evaluate=evaluate, matvec=chol.matvec, solve=chol.solve,
                     apply_sqrt=chol.apply_sqrt, kriging=krige,
                     description=f"dense Cholesky, certificate {chol.certificate:.3g}")


def _statespace(task: AuditTask, points: np.ndarray, kernel: Kernel) -> Reference:
    from harness.references.statespace import StateSpaceReference

    base = StateSpaceReference(points, kernel)

    def evaluate(model: Kernel, y: np.ndarray) -> Any:
        ev = base.with_kernel(model).evaluate(y, mean=task.mean, reml=task.reml, score=True)

        def loglik(theta: np.ndarray) -> float:
            return base.with_kernel(model.with_theta(theta)).loglik(y, mean=task.mean,
                                                                      reml=task.reml)
        info = observed_information(loglik, model.theta)
        return replace(ev, fisher=info, notes=(*ev.notes, "fisher: observed information, "
                                               f"central differences, step {HESSIAN_STEP:g}"))

    return Reference(kind="statespace", evaluate=evaluate,
                     description="Kalman filter (exact); Fisher by observed information",
                     notes=["matvec, solve and kriging not offered by the state-space "
                            "reference: factorization, solve and kriging metrics skipped"])


def _kronecker(task: AuditTask, points: np.ndarray, kernel: Kernel) -> Reference:
    from harness.references.kronecker import KroneckerReference

    base = KroneckerReference(points, kernel)  # type: ignore[arg-type]

    def evaluate(model: Kernel, y: np.ndarray) -> Any:
        ref = base if model is kernel else KroneckerReference(points, model)  # type: ignore[arg-type]
        return ref.evaluate(y, mean=task.mean, reml=task.reml, score=True, fisher=True)

    return Reference(kind="kronecker", evaluate=evaluate, matvec=base.matvec, solve=base.solve,
                     description="Kronecker eigen-decomposition (exact)",
                     notes=["kriging not offered by the Kronecker reference: skipped"])


def _ladder(task: AuditTask, points: np.ndarray, kernel: Kernel, solver: Any,
            streams: dict[str, np.random.Generator]) -> Reference:
    from harness.likelihood import evaluate_likelihood, kriging

    if task.tol is None:
        raise TaskSkipped("ladder reference needs a tolerance; the solver is exact"
                          if task.knob_name == "tol" else
                          f"ladder reference needs a tolerance; the solver's knob is "
                          f"{task.knob_name}")
    tol = task.tol / task.ladder_factor
    options = task_solver_options(task, solver)
    fact = solver.factorize(points, kernel, kernel.theta, tol=tol, **options)
    probe_seed = int(streams["probes"].integers(2 ** 63))

    def evaluate(model: Kernel, y: np.ndarray) -> Any:
        f = fact if model is kernel else solver.factorize(points, kernel, model.theta,
                                                          tol=tol, **options)
        return evaluate_likelihood(f, points, y, model, mean=task.mean, reml=task.reml,
                                   score=True, trace=task.trace_method, probes=task.probes,
                                   rng=probe_seed + 1, fisher=True)

    def krige(y: np.ndarray, new: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        pred = kriging(fact, points, y, kernel, new, mean=task.mean)
        return pred.mean, pred.variance

    return Reference(kind="ladder", evaluate=evaluate, matvec=fact.matvec, solve=fact.solve,
                     apply_sqrt=fact.apply_sqrt if fact.supports_sqrt else None, kriging=krige,
                     description=f"{task.solver} at tol {tol:.1e} (tol / {task.ladder_factor:g})",
                     notes=["reference is the same solver at a tighter tolerance "
                            "(a stand-in, not exact)"])


def _operator(task: AuditTask, points: np.ndarray, kernel: Kernel,
              streams: dict[str, np.random.Generator]) -> Reference:
    """The exact operator, preconditioned by the default of
    ``harness.audit.operator_preconditioner`` (HODLR at ``HODLR_TOL``): every value from
    exact kernel products, with its standard error (log det, traces) or bound (quadratic
    form)."""
    from harness.audit.operator_preconditioner import (
        HODLR_TOL,
        PreconditionerSpec,
        build_operator_preconditioner,
    )
    from harness.references.operator import operator_evaluate

    probe_seed = int(streams["probes"].integers(2 ** 63))
    uncertainty: dict[str, float] = {}
    preconditioner = f"hodlr at tol {HODLR_TOL:g}"
    notes = ["operator reference: log-likelihood with a standard error (its "
             "column reference_loglik_se); no Fisher information, so score "
             "metrics and parameter shifts are unavailable",
             f"operator reference preconditioned by {preconditioner}"]

    def evaluate(model: Kernel, y: np.ndarray) -> Any:
        built = build_operator_preconditioner(
            points, model, PreconditionerSpec(),
            rng=np.random.default_rng(solver_seed(task.seed, 0)))
        ev = operator_evaluate(points, y, model, mean=task.mean, reml=task.reml,
                               preconditioner=built.factorization, rng=probe_seed,
                               score=True)
        if not ev.converged:
            raise TaskSkipped("operator reference unresolved: " + "; ".join(ev.messages))
        if model is kernel:
            # every term of the operator's stated uncertainty (probes, Lanczos, CG, rounding)
            uncertainty.update(loglik_se=ev.loglik_se, loglik_bound=ev.loglik_bound)
        return ev.as_model_evaluation()

    return Reference(kind="operator", evaluate=evaluate,
                     description=("exact operator: tiled kernel products, PCG and Lanczos "
                                  f"quadrature, preconditioned by {preconditioner}"),
                     notes=notes, uncertainty=uncertainty)


def task_reference(kind: str, task: AuditTask, points: np.ndarray, kernel: Kernel,
                   solver: Any, streams: dict[str, np.random.Generator]) -> Reference:
    """The detailed reference of ``kind`` (module docstring) for the task's points."""
    if kind == "dense":
        return _dense(task, points, kernel)
    if kind == "statespace":
        return _statespace(task, points, kernel)
    if kind == "kronecker":
        return _kronecker(task, points, kernel)
    if kind == "operator":
        return _operator(task, points, kernel, streams)
    if kind == "ladder":
        return _ladder(task, points, kernel, solver, streams)
    raise ValueError(f"reference kind {kind!r} has no detailed form")


def draw_y(task: AuditTask, points: np.ndarray, observed: np.ndarray | None,
           kernel: Kernel, reference: Reference, solver: Any,
           streams: dict[str, np.random.Generator]) -> tuple[np.ndarray, str]:
    """The task's y and where it came from (module docstring)."""
    if observed is not None:
        return observed, f"file column {task.pointset.value_column!r}"
    z = np.asarray(streams["sample"].standard_normal(points.shape[0]))
    if reference.apply_sqrt is not None and reference.kind == "dense":
        return reference.apply_sqrt(z), "dense Cholesky factor"
    fact = solver.factorize(points, kernel, kernel.theta, tol=task.sample_tol,
                            **task_solver_options(task, solver))
    if not fact.supports_sqrt:
        raise TaskSkipped(f"cannot draw y: the {reference.kind} reference and solver "
                          f"{task.solver!r} offer no square root (apply_sqrt)")
    return fact.apply_sqrt(z), f"{task.solver} factor at tol {task.sample_tol:g}"
