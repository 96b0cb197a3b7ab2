"""The adapter from a grid task to the engine: the runner's two jobs of one task.

Everything is rebuilt on the worker from the task's parameters (no n x n array is ever
shipped): the solver (checked against the version the task was built for), the kernel
from its family and parameters, the points from the task (``Task.load_points``: a
generator and the task's ``points`` stream, or a data file). Then

* ``audit_accuracy``: the engine's task path (``harness.audit.task_engine.audit_task``:
  reference, y, ``harness.audit.engine.audit_tolerances`` and the detailed metrics);
* ``audit_timing``: the solver's phases (``harness.audit.task_timing``).

The task is read through ``harness.audit.task_protocol`` (with the two data methods
below), so nothing here imports the grid.
"""

from __future__ import annotations

import time
from collections.abc import Mapping
from typing import Any, Protocol

import numpy as np

from harness.audit.task_engine import TaskInputs, audit_task
from harness.audit.task_protocol import AuditTask
from harness.audit.task_references import TaskSkipped
from harness.audit.task_timing import time_task
from harness.model.kernels import Kernel, make_kernel

__all__ = ["SolverMismatchError", "TaskSkipped", "audit_accuracy", "audit_timing",
           "build_kernel"]


class SolverMismatchError(RuntimeError):
    """The worker resolved a different solver version than the task was built for."""


class _Points(Protocol):
    @property
    def points(self) -> np.ndarray: ...
    @property
    def new_points(self) -> np.ndarray: ...
    @property
    def observed(self) -> np.ndarray | None: ...


class GridTask(AuditTask, Protocol):
    """A grid task with its data methods (``harness.grid.tasks.Task``)."""

    @property
    def kernel_params(self) -> Mapping[str, Any]: ...
    @property
    def repeats(self) -> int: ...
    @property
    def warmup(self) -> int: ...
    def load_points(self, streams: Mapping[str, np.random.Generator]) -> _Points: ...
    def streams(self) -> dict[str, np.random.Generator]: ...


def build_kernel(task: GridTask) -> Kernel:
    """The task's kernel (wrapped as the separable product model when asked)."""
    kernel = make_kernel(task.kernel, dict(task.kernel_params))
    if task.separable:
        from harness.references.kronecker import SeparableKernel

        return SeparableKernel(kernel)  # type: ignore[return-value]
    return kernel


def _resolve(task: GridTask) -> Any:
    from harness.solvers.registry import resolve_solver

    solver = resolve_solver(task.solver)
    version = str(solver.version) if solver.version is not None else "unknown"
    if version != task.solver_version:
        raise SolverMismatchError(
            f"solver {task.solver!r}: the task was built for version {task.solver_version!r} "
            f"but this worker loads {version!r}; install the same version everywhere")
    return solver


def audit_accuracy(task: GridTask) -> dict[str, Any]:
    """Run the accuracy part of one task; returns the JSON-able result body.

    Raises ``TaskSkipped`` when the task cannot be audited as configured; any other
    exception is a failure of the task.
    """
    clock = time.perf_counter()
    streams = task.streams()
    solver = _resolve(task)
    kernel = build_kernel(task)
    data = task.load_points(streams)
    return audit_task(TaskInputs(task=task, solver=solver, kernel=kernel, points=data.points,
                                 new_points=data.new_points, observed=data.observed,
                                 streams=streams,
                                 seconds={"data": time.perf_counter() - clock}))


def audit_timing(task: GridTask) -> dict[str, Any]:
    """Time the solver's phases; returns the JSON-able timing body."""
    streams = task.streams()
    solver = _resolve(task)
    kernel = build_kernel(task)
    points = task.load_points(streams).points
    return time_task(task, solver, kernel, points, streams, repeats=task.repeats,
                     warmup=task.warmup)
