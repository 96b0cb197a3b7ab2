"""The unit of work a backend executes: one stage of one task, run on a worker.

``execute`` is what every backend calls on its workers. It rebuilds the task from its
parameters, limits BLAS and numba threads (one for accuracy work, ``timing_threads``
while timing) and returns a plain-dict outcome. Ordinary exceptions become a ``failed``
outcome with the exception type, message and traceback summary, so only a dying worker
process surfaces at the backend (which records it with ``crash_outcome``).
"""

from __future__ import annotations

import contextlib
from collections.abc import Iterator, Mapping
from dataclasses import dataclass, field
from typing import Any

from harness.grid.store.task_records import error_summary, now, worker_identity
from harness.model.json_values import to_jsonable

STAGES = ("accuracy", "timing", "accuracy+timing")


@dataclass(frozen=True)
class Job:
    """One stage of one task, as shipped to a worker (parameters only)."""

    key: str
    label: str
    stage: str
    task: Mapping[str, Any] = field(repr=False)
    concurrency: int = 1
    timeout: float | None = None  # seconds before the worker is stopped (None: no limit)

    def __post_init__(self) -> None:
        if self.stage not in STAGES:
            raise ValueError(f"Job.stage must be one of {STAGES}, got {self.stage!r}")

    def to_dict(self) -> dict[str, Any]:
        return {"key": self.key, "label": self.label, "stage": self.stage,
                "task": dict(self.task), "concurrency": self.concurrency,
                "timeout": self.timeout}


@contextlib.contextmanager
def limited_threads(threads: int) -> Iterator[None]:
    """BLAS/OpenMP pools (threadpoolctl) and numba limited to ``threads`` inside the block."""
    from threadpoolctl import threadpool_limits

    try:
        import numba
    except ImportError:  # pragma: no cover - numba is a dependency
        numba = None
    previous = numba.get_num_threads() if numba is not None else None
    with threadpool_limits(limits=threads):
        if numba is not None:
            numba.set_num_threads(max(1, min(threads, numba.config.NUMBA_NUM_THREADS)))
        try:
            yield
        finally:
            if numba is not None and previous is not None:
                numba.set_num_threads(previous)


def execute(job: Mapping[str, Any]) -> dict[str, Any]:
    """Run one job (a ``Job.to_dict()``) and return its outcome (module docstring)."""
    from harness.audit.task_audit import TaskSkipped, audit_accuracy, audit_timing
    from harness.audit.timing import thread_settings
    from harness.grid.cases.cost import time_budget_problem
    from harness.grid.tasks import Task

    started = now()
    outcome: dict[str, Any] = {"key": job["key"], "stage": job["stage"], "started": started,
                               "worker": worker_identity()}
    try:
        task = Task.from_dict(job["task"])
        stage = job["stage"]
        if stage in ("accuracy", "accuracy+timing"):
            if (problem := time_budget_problem(task)) is not None:
                raise TaskSkipped(problem)
            with limited_threads(1):
                outcome["environment"] = {"threads": thread_settings()}
                outcome["result"] = audit_accuracy(task)
        if stage in ("timing", "accuracy+timing"):
            with limited_threads(task.timing_threads):
                outcome["timing"] = audit_timing(task)
        outcome["status"] = "ok"
    except TaskSkipped as exc:
        outcome["status"] = "skipped"
        outcome["skip_reason"] = str(exc)
    except Exception as exc:  # noqa: BLE001 - any task failure is recorded, the grid goes on
        outcome["status"] = "failed"
        outcome["error"] = error_summary(exc)
    outcome["finished"] = now()
    return to_jsonable(outcome)


def crash_outcome(job: Job, message: str, *, error_type: str = "WorkerCrashed"
                  ) -> dict[str, Any]:
    """The outcome of a job whose worker process died (os._exit, a signal, a segfault)."""
    return {"key": job.key, "stage": job.stage, "started": None, "finished": now(),
            "worker": None, "status": "failed",
            "error": {"type": error_type, "message": message, "traceback": ""}}
