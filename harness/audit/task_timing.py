"""A grid task's timing job: the solver's phases on white-noise data.

It times factor, log det, solve, gradient and the total (their cost does not depend on
the values), then traces the memory of one more factorization. The runner may schedule
it alone (``exclusive_timing``), apart from the accuracy work.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from harness.audit.task_protocol import AuditTask
from harness.audit.task_references import task_solver_options
from harness.audit.timing import measure_memory, thread_settings, time_phase
from harness.model.kernels import Kernel


def time_task(task: AuditTask, solver: Any, kernel: Kernel, points: np.ndarray,
              streams: dict[str, np.random.Generator], *, repeats: int, warmup: int
              ) -> dict[str, Any]:
    """Time the solver's phases (module docstring); returns the JSON-able timing body."""
    from harness.likelihood import evaluate_likelihood

    y = np.asarray(streams["sample"].standard_normal(points.shape[0]))
    theta = kernel.theta
    options = task_solver_options(task, solver)

    def factor() -> Any:
        return solver.factorize(points, kernel, theta, tol=task.tol, **options)

    def gradient(fact: Any) -> Any:
        return evaluate_likelihood(fact, points, y, kernel, mean=task.mean, reml=task.reml,
                                   score=True, trace=task.trace_method, probes=task.probes,
                                   rng=0)

    reps = {"repeats": repeats, "warmup": warmup}
    t_factor, fact = time_phase("factor", factor, **reps)
    t_logdet, _ = time_phase("logdet", fact.logdet, **reps)
    t_solve, _ = time_phase("solve", lambda: fact.solve(y), **reps)
    t_grad, _ = time_phase("gradient", lambda: gradient(fact), **reps)
    t_total, _ = time_phase("total", lambda: gradient(factor()), **reps)
    phases = [t_factor, t_logdet, t_solve, t_grad, t_total]
    # Traced after the timed calls, so JIT compilation is not traced (tracemalloc slows
    # allocation-heavy code; its run is not one of the timed samples).
    memory, _ = measure_memory(factor)
    return {"phases": {p.phase: p.to_dict() for p in phases}, "threads": thread_settings(),
            "nbytes": int(fact.nbytes), "memory": memory.to_dict()}
