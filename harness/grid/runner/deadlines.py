"""How long one job of a task may run before its worker is stopped.

The limit is, in order: the ``--task-timeout`` given to the run, the case file's
``[timing] timeout``, or the task's cost estimate (``harness.grid.cases.cost``) times
``TIMEOUT_SAFETY_FACTOR``, never below ``TIMEOUT_FLOOR_SECONDS``. The estimate is an
order-of-magnitude model for an idle core, so the factor and the floor are generous
(common practice chosen here: a hung task is stopped within minutes, a slow one is not).
"""

from __future__ import annotations

import math

from harness.grid.cases.cost import estimate_cost
from harness.grid.tasks import Task

#: Multiple of the estimated task seconds allowed before a job counts as hung.
TIMEOUT_SAFETY_FACTOR = 50.0
#: Shortest default timeout (seconds): start-up, imports and compilation included.
TIMEOUT_FLOOR_SECONDS = 300.0


def default_timeout(task: Task) -> float:
    """``max(TIMEOUT_FLOOR_SECONDS, TIMEOUT_SAFETY_FACTOR * estimated seconds)``."""
    estimate = estimate_cost(task, dense_limit_bytes=task.memory_budget).seconds
    if not math.isfinite(estimate):
        return TIMEOUT_FLOOR_SECONDS
    return max(TIMEOUT_FLOOR_SECONDS, TIMEOUT_SAFETY_FACTOR * estimate)


def task_timeout(task: Task, *, override: float | None = None) -> float:
    """The timeout of ``task``'s jobs in seconds (module docstring)."""
    if override is not None:
        if not (math.isfinite(override) and override > 0):
            raise ValueError(f"--task-timeout must be a positive number of seconds, got "
                             f"{override!r}")
        return float(override)
    if task.timeout is not None:
        return float(task.timeout)
    return default_timeout(task)
