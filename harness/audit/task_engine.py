"""A grid task through the one engine: its reference, its y, then ``audit_tolerances``.

A ``run`` task brings its points (generated, or read from a data file) and fixed
parameters theta_0; from there it takes the same path as ``check``:

1. the reference kind from ``harness.audit.reference_choice.select_reference`` over the
   task's allowed kinds (a case file's ``[reference] order``), with why others did not
   apply; the engine's reference (``audit_references.build_reference``, the dense one in
   this worker process, which is ``run``'s crash boundary) and the detailed one of the
   task's metric groups (``task_references.task_reference``);
2. y (``task_references.draw_y``);
3. the engine (``harness.audit.engine.audit_tolerances``) at the task's tolerance on the
   task's solver seed, with the kriging holdout and probes drawn from the task's seed as
   ``check`` draws them from ``--seed`` (``harness.audit.audit_sampling``), judged with
   the default limits (``Thresholds``); it also computes the task's detailed metric
   groups (``task_metrics``).

The record keeps every column it had and adds the engine's verdict: ``audit`` (the same
JSON form as a tolerance of ``check --json``, with its status) and the flat numeric
columns ``audit_<metric>`` and ``audit_<metric>_uncertainty``.
"""

from __future__ import annotations

import time
from dataclasses import dataclass
from typing import Any

import numpy as np

from harness.audit import engine
from harness.audit.audit_references import (
    build_reference,
    operator_available,
    reference_by_metric,
)
from harness.audit.audit_sampling import MIN_HOLDOUT, audit_draws, variance_positions
from harness.audit.metric_names import canonical_name
from harness.audit.reference_choice import NoReference, ReferenceProblem, select_reference
from harness.audit.rule import ReferenceInfo, Thresholds
from harness.audit.solver_seeds import solver_seed
from harness.audit.task_metrics import DetailRequest
from harness.audit.task_protocol import AuditTask
from harness.audit.task_references import Reference, TaskSkipped, draw_y, task_reference
from harness.infra.option_specs import HOLDOUT_POINTS
from harness.model.json_values import to_jsonable
from harness.model.kernels import Kernel


@dataclass(frozen=True)
class TaskInputs:
    """A grid task's data as its adapter built it.

    ``new_points`` are the task's kriging points of the detailed metrics; ``observed``
    the values of a data file's value column (None: y is drawn); ``streams`` the task's
    random streams; ``seconds`` the time taken to build the data.
    """

    task: AuditTask
    solver: Any
    kernel: Kernel
    points: np.ndarray
    new_points: np.ndarray
    observed: np.ndarray | None
    streams: dict[str, np.random.Generator]
    seconds: dict[str, float]


def _reference(inp: TaskInputs) -> tuple[str, Reference, tuple[str, ...]]:
    """The first allowed kind that applies and builds (a Kronecker reference may still
    refuse the points), its detailed reference and the kinds passed over."""
    task = inp.task
    problem = ReferenceProblem(
        n=int(inp.points.shape[0]), d=int(inp.points.shape[1]), kernel=inp.kernel,
        separable=task.separable, tensor_grid=task.pointset.generator == "tensor_grid",
        memory_budget=task.memory_budget, dense_fisher=True,
        has_tolerance=task.tol is not None, operator_installed=operator_available())
    # (a solver whose knob is not tol has no tol: the ladder, tol / factor, declines)
    allowed = list(task.references)
    declined: list[str] = []
    while True:
        try:
            choice = select_reference(problem, allowed=allowed)
        except NoReference as exc:
            raise TaskSkipped("no reference available: "
                              + "; ".join((*declined, *exc.declined))) from None
        declined.extend(choice.declined)
        allowed = allowed[allowed.index(choice.kind) + 1:]
        try:
            return choice.kind, task_reference(choice.kind, task, inp.points, inp.kernel,
                                               inp.solver, inp.streams), tuple(declined)
        except ValueError as exc:   # KroneckerError: the points are no full grid
            if choice.kind != "kronecker":
                raise
            declined.append(f"kronecker: {exc}")


class _Unjudged:
    """The reference of an exact solver's task: no tolerance, so nothing is judged."""

    def __init__(self, info: ReferenceInfo) -> None:
        self.info = info

    def sides(self, tol: float) -> engine.ReferenceSides:
        raise RuntimeError("an exact solver's task has no tolerance to judge")


def _flat_columns(audit: engine.ToleranceAudit) -> dict[str, Any]:
    """The engine's deciding values as flat, numeric ``results.csv`` columns (added beside
    the old ones; the status is in the record's ``audit``)."""
    out: dict[str, Any] = {}
    for m in audit.worst_metrics():
        name = canonical_name(m.name)
        out[f"audit_{name}"] = m.value
        if m.threshold is not None:
            out[f"audit_{name}_uncertainty"] = m.uncertainty or 0.0
    return out


def audit_task(inp: TaskInputs) -> dict[str, Any]:
    """Audit one grid task (module docstring); returns the JSON-able result body.

    Raises ``TaskSkipped`` when no allowed reference applies.
    """
    task, kernel, points = inp.task, inp.kernel, inp.points
    seconds = dict(inp.seconds)
    clock = time.perf_counter()
    kind, reference, declined = _reference(inp)
    y, y_source = draw_y(task, points, inp.observed, kernel, reference, inp.solver,
                         inp.streams)
    ref0 = reference.evaluate(kernel, y)
    seconds["reference"] = time.perf_counter() - clock
    n = int(points.shape[0])
    size = max(MIN_HOLDOUT, min(task.holdout, n // 2, HOLDOUT_POINTS.default))
    holdout, probes = audit_draws(n, holdout=size, probes=task.probes, seed=task.seed)
    fisher = None if ref0.fisher is None else np.asarray(ref0.fisher, dtype=float)
    data = engine.AuditData(points=points, y=np.asarray(y, dtype=float), kernel=kernel,
                            mean=task.mean, holdout=holdout, fisher=fisher, probes=probes,
                            variance_at=variance_positions(holdout.size, seed=task.seed))
    engine_reference: engine.PairedReference | engine.ValueReference
    if task.knob_value is None:   # an exact solver: nothing to judge, detailed metrics only
        engine_reference = _Unjudged(ReferenceInfo(kind, True, reference.description))
    else:
        engine_reference = build_reference(
            kind, data, solver=inp.solver, solver_options=task.solver_options,
            base_seed=task.seed, memory_budget=task.memory_budget,
            ladder_factor=task.ladder_factor, probes=task.probes, isolate=False)
    detail = DetailRequest(task=task, solver=inp.solver, kernel=kernel, points=points,
                           new_points=inp.new_points, y=y, y_source=y_source,
                           reference=reference, ref0=ref0, declined=declined,
                           streams=inp.streams, seconds=seconds)
    result = engine.audit_tolerances(
        data, inp.solver, () if task.knob_value is None else (float(task.knob_value),),
        engine_reference,
        seeds=(solver_seed(task.seed, 0),), solver_options=task.solver_options,
        thresholds=Thresholds(), detail=detail)
    body: dict[str, Any] = dict(result.detail or {})
    if not result.tolerances:
        return body
    (audit,) = result.tolerances
    body["metrics"] = {**body["metrics"], **to_jsonable(_flat_columns(audit))}
    body["audit"] = to_jsonable(
        audit.to_dict(kind) | {"reference_detail": result.reference.to_dict(),
                               "reference_by_metric": reference_by_metric(engine_reference,
                                                                          data)})
    return body
