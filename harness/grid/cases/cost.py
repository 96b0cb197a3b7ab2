"""Cost estimates of tasks, for planning (``covaudit cases``) and the time budget.

The model, per task (seconds):

- dense work (the certified reference, or the dense solver): floating-point operations
  divided by the machine's dense rate ``rate`` (flop/s): Cholesky n^3/3, inverse 2n^3/3
  and the Fisher products 2 p n^3 (Golub & Van Loan, *Matrix Computations*, 4th ed.,
  section 4.2: Cholesky costs n^3/3 flops), twice (at the data-generating parameters and
  a perturbed point);
- compressed work: ``COMPRESSED_UNIT_FLOPS`` times n log2(n)^2 times a rank that grows
  with log10(1/tol) (the usual HODLR factorization cost O(n log^2 n r^2) folded into one
  constant), plus a fixed ``EVAL_OVERHEAD_FLOPS``, per likelihood-and-gradient
  evaluation;
- a fixed cost per job (``JOB_OVERHEAD_FLOPS``: data generation, kernel assembly, record
  and table writing) and, once per run with a compressed solver, its start-up
  (``STARTUP_FLOPS``: just-in-time compilation);
- timing repeats and warm-up runs repeat the solver's evaluation.

Every constant is expressed in flops of dense work, so one measured number, the dense
rate of this machine (``harness.linalg.dense_rate.measure_dense_rate``: a Cholesky
factorization of an n = 1,024 matrix on one thread, median of 5, about 0.25 s),
calibrates the whole model. The constants were fitted to measured runs of
``cases/smoke.toml`` on a 2-core machine (see ``benchmarks/results/cost_model.json``);
elsewhere they are estimates, shown as such.
Without a measured rate the model assumes ``DENSE_FLOPS``. The solver's share (dense and
compressed evaluations, the rank, ``DENSE_FLOPS``) lives in ``harness.infra.solver_cost``,
which the default time limit of a solver call (``harness.infra.solver_timeout``) uses too.

The probe runs for a fraction of a second on one thread and so sees a core to itself
even on a busy machine, while the run then shares the cores with everything else: the
grid estimate is multiplied by the expected share, ``contention = max(1, (load + 1) /
cores)`` with ``load`` the one-minute load average (the scheduler's fair share of
``cores`` among ``load + 1`` runnable processes; common practice, from memory). A probe
alone missed a loaded run by a factor 3 (``benchmarks/results/cost_model_probe_only.json``).
"""

from __future__ import annotations

import math
import os
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from harness.grid.tasks import Task
from harness.infra.solver_cost import DENSE_FLOPS, dense_flops, evaluation_flops
from harness.linalg.dense_rate import DenseRate
from harness.references.operator.product_cost import ProductCost

#: Dense-work flops of the fixed cost of one job (accuracy or timing).
JOB_OVERHEAD_FLOPS = 3.6e9
#: Dense-work flops of a run's start-up when it holds a compressed-solver task.
STARTUP_FLOPS = 8.1e10
#: Assumed exact-product speed (n^2-entry columns per second, both cores) when none was
#: measured: benchmarks/results/operator_reference.json measured 1.5e10 at n = 131,072
#: (Matern 3/2, 2D) on a loaded 2-core machine; 1e10 leaves room for slower kernels.
OPERATOR_COLUMN_RATE = 1e10


@dataclass(frozen=True)
class CostEstimate:
    """Estimated seconds and peak bytes of one task (reference and solver together)."""

    seconds: float
    bytes: int
    dense_reference: bool
    operator_reference: bool = False

    def to_dict(self) -> dict[str, float | int | bool]:
        return {"estimated_seconds": self.seconds, "estimated_bytes": self.bytes,
                "dense_reference": self.dense_reference,
                "operator_reference": self.operator_reference}


def contention(*, load: float | None = None, cores: int | None = None) -> float:
    """``max(1, (load + 1) / cores)``: how much slower a run is expected to go than the
    probe measured, on a machine running ``load`` other processes (module docstring).
    Defaults: the one-minute load average and ``os.cpu_count()``; 1 where unknown."""
    if load is None:
        try:
            load = os.getloadavg()[0]
        except (AttributeError, OSError):
            return 1.0
    cores = cores or os.cpu_count() or 1
    if not (math.isfinite(load) and load >= 0):
        return 1.0
    return max(1.0, (load + 1.0) / cores)


@dataclass(frozen=True)
class GridEstimate:
    """The tasks' estimates, the run's start-up and their total (seconds, serial), all
    times ``contention`` (1 on an idle machine)."""

    tasks: tuple[CostEstimate, ...]
    startup_seconds: float
    rate: float
    measured: bool
    contention: float = 1.0

    @property
    def total_seconds(self) -> float:
        return self.contention * (self.startup_seconds + sum(t.seconds for t in self.tasks))

    def to_dict(self) -> dict[str, object]:
        return {"total_seconds": self.total_seconds, "startup_seconds": self.startup_seconds,
                "dense_flops_per_second": self.rate, "rate_measured": self.measured,
                "contention": self.contention}


def _params(task: Task) -> int:
    ls = task.kernel_params.get("lengthscale", 1.0)
    k = len(ls) if isinstance(ls, list | tuple) else 1
    return 1 + k + (1 if float(task.kernel_params.get("nugget", 0.0)) > 0 else 0)


def _jobs(task: Task) -> int:
    return 2 if task.timing and task.exclusive_timing else 1


def _operator_seconds(task: Task, cost: ProductCost | float) -> float:
    """Seconds of the exact-operator reference: each product call at its width from a
    measured ``ProductCost`` (``harness.references.operator.operator_evaluation_seconds``:
    a product evaluates its n^2 kernel entries once whatever its width), or its predicted
    n^2-entry column products at a column rate when only that is known
    (``estimate_operator_seconds``)."""
    from harness.model.mean import design_matrix
    from harness.references.operator import (
        estimate_operator_seconds,
        operator_evaluation_seconds,
    )

    mean_columns = design_matrix(np.zeros((1, task.d)), task.mean).shape[1]
    if isinstance(cost, ProductCost):
        seconds = operator_evaluation_seconds(task.n, cost, n_params=_params(task),
                                              mean_columns=mean_columns)
    else:
        seconds = estimate_operator_seconds(task.n, rate=cost, n_params=_params(task),
                                            mean_columns=mean_columns)
    return seconds * (2 if "perturbed" in task.metrics else 1)


def estimate_cost(task: Task, *, dense_limit_bytes: int | None,
                  rate: float | None = None,
                  operator_rate: ProductCost | float | None = None) -> CostEstimate:
    """Estimate one task's cost (module docstring); the dense reference is assumed when it
    fits the budget, the exact operator when the task's references name it and dense does
    not fit (or is not named).

    Parameters
    ----------
    rate : float, optional
        Dense flop/s of this machine (``measure_dense_rate``); ``DENSE_FLOPS`` when None.
    operator_rate : ProductCost or float, optional
        The measured cost of exact products by width
        (``harness.references.operator.measure_product_cost``), or exact-product columns
        (n^2 kernel entries each) per second; ``OPERATOR_COLUMN_RATE`` when None.
    """
    flops_per_second = DENSE_FLOPS if rate is None else float(rate)
    if not (math.isfinite(flops_per_second) and flops_per_second > 0):
        raise ValueError(f"estimate_cost: rate must be a positive flop/s, got {rate!r}")
    n, p = task.n, _params(task)
    dense_work, dense_bytes = dense_flops(n, p)
    use_dense = "dense" in task.references and (dense_limit_bytes is None
                                                or dense_bytes <= dense_limit_bytes)
    solver_work, solver_bytes = evaluation_flops(
        n, p, dense=task.solver == "dense", tol=task.tol,
        probes=0 if task.trace_method == "exact" else task.probes)
    work = solver_work * (2 if "perturbed" in task.metrics else 1)
    if task.timing:
        work += solver_work * (task.repeats + task.warmup)
    extra_seconds = 0.0
    if use_dense:
        work += dense_work
        peak = max(dense_bytes, solver_bytes)
    elif "operator" in task.references:
        extra_seconds = _operator_seconds(task, operator_rate or OPERATOR_COLUMN_RATE)
        work += solver_work  # the preconditioner's factorization
        peak = 2 * solver_bytes
    else:
        work += solver_work * 3  # structured or ladder reference: the same order
        peak = 2 * solver_bytes
    work += JOB_OVERHEAD_FLOPS * _jobs(task)
    return CostEstimate(seconds=work / flops_per_second + extra_seconds, bytes=peak,
                        dense_reference=use_dense, operator_reference=extra_seconds > 0)


def estimate_grid(tasks: Sequence[Task], *, dense_limit_bytes: int | None,
                  rate: DenseRate | float | None = None,
                  load_factor: float = 1.0,
                  operator_rate: ProductCost | float | None = None) -> GridEstimate:
    """Every task's estimate plus the run's start-up (compilation), serial seconds.

    Parameters
    ----------
    load_factor : float
        ``contention()`` of the machine (1: idle); multiplies the total.
    """
    measured = rate is not None
    value = rate.flops if isinstance(rate, DenseRate) else rate
    flops_per_second = DENSE_FLOPS if value is None else float(value)
    estimates = tuple(estimate_cost(t, dense_limit_bytes=dense_limit_bytes,
                                    rate=flops_per_second, operator_rate=operator_rate)
                      for t in tasks)
    startup = STARTUP_FLOPS / flops_per_second if any(t.solver != "dense"
                                                      for t in tasks) else 0.0
    return GridEstimate(tasks=estimates, startup_seconds=startup, rate=flops_per_second,
                        measured=measured, contention=max(1.0, float(load_factor)))


def time_budget_problem(task: Task) -> str | None:
    """Why ``task`` is over its time budget (``budget.time``) by ``estimate_cost``, or None."""
    if task.time_budget is None:
        return None
    from harness.linalg.dense_budget import default_memory_budget

    cost = estimate_cost(task, dense_limit_bytes=task.memory_budget or default_memory_budget())
    if cost.seconds > task.time_budget:
        return (f"estimated {cost.seconds:.3g} s exceeds the time budget of "
                f"{task.time_budget:g} s (budget.time)")
    return None
