"""A grid task's detailed metric groups: the solver under test at the task's tolerance
against the task's detailed reference (``harness.audit.task_references``).

The groups a case file asks for (``[metrics]``): log det, quadratic form and
log-likelihood errors; score errors and implied shifts at theta_0; trace errors; the
same at theta_0 + perturbation; the factorization error ||Sigma - Sigma~||; solve errors;
kriging errors at the task's new points (conditioned on all n points). Each is a column
of ``results.csv`` (``harness.grid.store.columns``); a group the reference cannot serve is
named in the notes. The engine (``harness.audit.engine.audit_tolerances``) computes them
beside its judged metrics when a grid task asks (``DetailRequest``).
"""

from __future__ import annotations

import math
import time
from dataclasses import dataclass
from typing import Any

import numpy as np

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
from harness.audit.task_protocol import AuditTask
from harness.audit.task_references import Reference, task_solver_options
from harness.audit.timing import peak_rss
from harness.model.evaluation import fisher_standard_errors
from harness.model.json_values import to_jsonable
from harness.model.kernels import Kernel, smoothness


@dataclass(frozen=True)
class DetailRequest:
    """Everything a task's detailed metrics need.

    ``new_points`` are the task's kriging points (not data points), ``ref0`` the
    reference's evaluation at theta_0, ``streams`` the task's random streams (probes and
    power iteration continue where the reference left them), ``seconds`` the times of
    the steps before (data, reference).
    """

    task: AuditTask
    solver: Any
    kernel: Kernel
    points: np.ndarray
    new_points: np.ndarray
    y: np.ndarray
    y_source: str
    reference: Reference
    ref0: Any
    declined: tuple[str, ...]
    streams: dict[str, np.random.Generator]
    seconds: dict[str, float]


def _finite(value: float | None) -> float | None:
    return float(value) if value is not None and math.isfinite(value) else None


def _check_finite(name: str, value: float, solver: str) -> None:
    if not math.isfinite(value):
        raise FloatingPointError(f"solver {solver!r} returned a non-finite {name}: {value!r}")


def _standard_errors(fisher: np.ndarray | None) -> np.ndarray | None:
    if fisher is None:
        return None
    try:
        return fisher_standard_errors(fisher)
    except np.linalg.LinAlgError:
        return None


def _score_groups(req: DetailRequest, sol0: Any, metrics: dict[str, Any],
                  notes: list[str]) -> None:
    task, ref0, names = req.task, req.ref0, req.kernel.param_names
    if "score" in task.metrics and sol0.score is not None:
        shift = None
        try:
            errs = score_errors(sol0.score, ref0.score, ref0.fisher, names)
            metrics.update(errs.to_dict("score"))
            shift = errs.shift
        except FisherError as exc:
            notes.append(f"score metrics unavailable: {exc}")
        nu = smoothness(req.kernel) if isinstance(req.kernel, Kernel) else None
        if shift is not None and nu is not None and "log_lengthscale" in names:
            metrics.update(microergodic_shift(shift, ref0.fisher, names, nu).to_dict())
    if "trace" in task.metrics and sol0.trace_terms is not None:
        # A ladder reference is a solver's ModelEvaluation: its traces are estimated.
        exact = (None if req.reference.kind == "ladder"
                 else getattr(ref0, "trace_terms", None))
        if exact is not None:
            metrics.update(trace_errors(sol0.trace_terms, exact, sol0.trace_stderr,
                                        names).to_dict())
        else:
            notes.append(f"trace metrics unavailable: the {req.reference.kind} reference "
                         "gives no exact traces")


def _perturbed_group(req: DetailRequest, metrics: dict[str, Any], notes: list[str]) -> None:
    from harness.likelihood import evaluate_likelihood

    task, kernel = req.task, req.kernel
    theta1 = kernel.theta + task.perturbation
    kernel1 = kernel.with_theta(theta1)
    fact1 = req.solver.factorize(req.points, kernel, theta1, tol=task.tol,
                                 **task_solver_options(task, req.solver))
    sol1 = evaluate_likelihood(fact1, req.points, req.y, kernel1, mean=task.mean,
                               reml=task.reml, score=True, trace=task.trace_method,
                               probes=task.probes, rng=req.streams["probes"], fisher=False)
    ref1 = req.reference.evaluate(kernel1, req.y)
    metrics.update(scalar_error(sol1.loglik, ref1.loglik).to_dict("perturbed_loglik"))
    try:
        if sol1.score is None:
            raise FisherError("the solver returned no score at the perturbed point")
        metrics.update(score_errors(sol1.score, ref1.score, ref1.fisher, kernel.param_names)
                       .to_dict("perturbed_score"))
    except FisherError as exc:
        notes.append(f"perturbed score metrics unavailable: {exc}")


def _operator_groups(req: DetailRequest, fact: Any, metrics: dict[str, Any],
                     notes: list[str]) -> None:
    """Factorization, solve and kriging errors (the groups that need the reference's
    products, solves or kriging)."""
    from harness.likelihood import kriging

    task, ref, n = req.task, req.reference, req.points.shape[0]
    norm_a = None
    if "factorization" in task.metrics:
        if ref.matvec is not None:
            fe = factorization_error(ref.matvec, fact.matvec, n, rng=req.streams["power"],
                                     iterations=task.power_iterations)
            metrics.update(fe.to_dict())
            norm_a = fe.reference_norm
        else:
            notes.append(f"factorization error unavailable: no exact matvec ({ref.kind})")
    if "solve" in task.metrics:
        if ref.matvec is not None:
            x_approx = fact.solve(req.y)
            x_exact = ref.solve(req.y) if ref.solve is not None else None
            if norm_a is None:
                norm_a = power_norm(ref.matvec, n, rng=req.streams["power"],
                                    iterations=task.power_iterations).value
            metrics.update(solve_errors(x_approx, x_exact, req.y - ref.matvec(x_approx),
                                        req.y, norm_a).to_dict())
        else:
            notes.append(f"solve errors unavailable: no exact matvec ({ref.kind})")
    if "kriging" in task.metrics:
        if ref.kriging is not None:
            pred = kriging(fact, req.points, req.y, req.kernel, req.new_points,
                           mean=task.mean)
            mean_exact, var_exact = ref.kriging(req.y, req.new_points)
            metrics.update(kriging_errors(pred.mean, pred.variance, mean_exact, var_exact,
                                          floor=1e-12 * req.kernel.variance).to_dict())
        else:
            notes.append(f"kriging errors unavailable with the {ref.kind} reference")


def group_metrics(req: DetailRequest) -> dict[str, Any]:
    """The task's detailed metrics and what they were measured on (the JSON-able body of
    a task record: ``metrics``, ``reference``, ``solver``, ``data``, ``memory``,
    ``seconds``, ``notes``)."""
    from harness.audit.metrics.kl_divergence import KL_NAT, kl_divergence_from_kernel
    from harness.likelihood import evaluate_likelihood

    task, kernel, ref0, reference = req.task, req.kernel, req.ref0, req.reference
    seconds = dict(req.seconds)
    clock = time.perf_counter()
    fact = req.solver.factorize(req.points, kernel, kernel.theta, tol=task.tol,
                                **task_solver_options(task, req.solver))
    seconds["factor"] = time.perf_counter() - clock
    _check_finite("log det", fact.logdet(), task.solver)
    clock = time.perf_counter()
    wants_score = bool({"score", "perturbed", "trace"} & set(task.metrics))
    sol0 = evaluate_likelihood(fact, req.points, req.y, kernel, mean=task.mean,
                               reml=task.reml, score=wants_score, trace=task.trace_method,
                               probes=task.probes, rng=req.streams["probes"], fisher=False)
    seconds["evaluate"] = time.perf_counter() - clock
    _check_finite("log-likelihood", sol0.loglik, task.solver)

    metrics: dict[str, Any] = {}
    notes: list[str] = [*reference.notes, *getattr(fact, "notes", ()), *sol0.notes]
    if "loglik" in task.metrics:
        metrics.update(scalar_error(sol0.logdet, ref0.logdet).to_dict("logdet"))
        metrics.update(scalar_error(sol0.quadratic, ref0.quadratic).to_dict("quadratic"))
        metrics.update(scalar_error(sol0.loglik, ref0.loglik).to_dict("loglik"))
        metrics["reference_loglik_se"] = float(reference.uncertainty.get("loglik_se", 0.0))
        metrics["reference_loglik_bound"] = float(reference.uncertainty.get("loglik_bound",
                                                                            0.0))
        if reference.kind == "dense":
            kl = kl_divergence_from_kernel(fact, kernel, req.points,
                                           logdet_exact=float(ref0.logdet))
            metrics[KL_NAT] = kl.value
    _score_groups(req, sol0, metrics, notes)
    if "perturbed" in task.metrics:
        _perturbed_group(req, metrics, notes)
    _operator_groups(req, fact, metrics, notes)

    ranks = getattr(fact, "ranks", None)
    names = kernel.param_names
    return {
        "metrics": to_jsonable(metrics),
        "reference": {"kind": reference.kind, "description": reference.description,
                      "declined": list(req.declined),
                      "certificate": _finite(getattr(ref0, "certificate", None) or math.nan),
                      "loglik": ref0.loglik, "score": to_jsonable(ref0.score),
                      "fisher": to_jsonable(ref0.fisher),
                      "standard_errors": to_jsonable(_standard_errors(ref0.fisher)),
                      "notes": list(ref0.notes)},
        "solver": {"name": task.solver, "version": task.solver_version, "tol": task.tol,
                   "knob_name": task.knob_name, "knob_value": task.knob_value,
                   "loglik": sol0.loglik, "score": to_jsonable(sol0.score),
                   "trace_estimate": to_jsonable(sol0.trace_terms),
                   "trace_stderr": to_jsonable(sol0.trace_stderr),
                   "nbytes": int(fact.nbytes), "ranks": None if callable(ranks) else ranks,
                   "solves": sol0.solves, "matvecs": sol0.matvecs},
        "data": {"n": int(req.points.shape[0]), "d": int(req.points.shape[1]),
                 "y_source": req.y_source, "theta0": kernel.theta.tolist(),
                 "param_names": list(names), "kernel": kernel.describe()},
        "memory": {"process_peak_rss_bytes": peak_rss()},
        "seconds": seconds,
        "notes": notes,
    }
