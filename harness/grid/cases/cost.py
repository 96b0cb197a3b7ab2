"""Rough cost estimates of a task, for planning (``covaudit cases``) and the time budget.

These are order-of-magnitude models, not measurements: dense work at an assumed
``DENSE_FLOPS`` floating-point operations per second on one core, compressed work as
n log2(n)^2 times a rank that grows with log10(1/tol). Shown as estimates, and used to
skip tasks whose estimate exceeds a case's time budget.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from harness.grid.tasks import Task

#: Assumed sustained dense throughput of one core (flop/s).
DENSE_FLOPS = 2e10
#: Assumed seconds per (n log2(n)^2 rank) unit of compressed-solver work.
COMPRESSED_UNIT_SECONDS = 2e-8


@dataclass(frozen=True)
class CostEstimate:
    """Estimated seconds and peak bytes of one task (reference and solver together)."""

    seconds: float
    bytes: int
    dense_reference: bool

    def to_dict(self) -> dict[str, float | int | bool]:
        return {"estimated_seconds": self.seconds, "estimated_bytes": self.bytes,
                "dense_reference": self.dense_reference}


def _params(task: Task) -> int:
    ls = task.kernel_params.get("lengthscale", 1.0)
    k = len(ls) if isinstance(ls, list | tuple) else 1
    return 1 + k + (1 if float(task.kernel_params.get("nugget", 0.0)) > 0 else 0)


def _rank(tol: float | None) -> float:
    return 4.0 + 6.0 * math.log10(1.0 / tol) if tol else 0.0


def _dense(n: int, p: int) -> tuple[float, int]:
    # Cholesky n^3/3, inverse 2n^3/3, Fisher 2 p n^3, twice (theta_0 and perturbed).
    flops = 2 * (n ** 3 / 3 + 2 * n ** 3 / 3 + 2 * p * n ** 3)
    return flops / DENSE_FLOPS, int(8 * n * n * (p + 3))


def estimate_cost(task: Task, *, dense_limit_bytes: int | None) -> CostEstimate:
    """Estimate one task's cost; the dense reference is assumed when it fits the budget."""
    n, p = task.n, _params(task)
    dense_seconds, dense_bytes = _dense(n, p)
    use_dense = "dense" in task.references and (dense_limit_bytes is None
                                                or dense_bytes <= dense_limit_bytes)
    if task.solver == "dense":
        solver_seconds, solver_bytes = dense_seconds / 2, 8 * n * n
    else:
        rank = _rank(task.tol) or 20.0
        units = n * max(math.log2(max(n, 2)), 1.0) ** 2 * rank
        solver_seconds = COMPRESSED_UNIT_SECONDS * units * (1 + task.probes * p / 50)
        solver_bytes = int(8 * n * rank * max(math.log2(max(n, 2)), 1.0) * 2)
    seconds = solver_seconds * (2 if "perturbed" in task.metrics else 1)
    if task.timing:
        seconds += solver_seconds * (task.repeats + task.warmup)
    if use_dense:
        seconds += dense_seconds
        peak = max(dense_bytes, solver_bytes)
    else:
        seconds += solver_seconds * 3  # structured or ladder reference: the same order
        peak = 2 * solver_bytes
    return CostEstimate(seconds=seconds, bytes=peak, dense_reference=use_dense)
