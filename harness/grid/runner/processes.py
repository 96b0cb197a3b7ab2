"""Run jobs on local worker processes, ``workers`` at a time.

The workers (``harness.grid.runner.workers.WorkerPool``) are forked from the fork server
(or started with ``spawn``; ``describe`` records which), reused across jobs, ignore
SIGINT and die with their parent. Each job limits its own BLAS threads
(``harness.grid.runner.jobs.limited_threads``). A worker that dies is recorded against its
own job only (each worker runs one job at a time, so there is no doubt whose job killed
it), a job past its timeout is stopped and recorded as ``TaskTimeout``, and the grid goes
on.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

from harness.grid.runner.backend import OutcomeCallback
from harness.grid.runner.jobs import Job
from harness.grid.runner.workers import WorkerPool


class ProcessBackend:
    """``workers`` local processes (see module docstring)."""

    name = "processes"
    shared = False

    def __init__(self, workers: int) -> None:
        if workers < 1:
            raise ValueError(f"--workers must be >= 1, got {workers}")
        self.workers = int(workers)
        self._pool = WorkerPool(self.workers)

    def run(self, jobs: Sequence[Job], *, concurrency: int, on_outcome: OutcomeCallback
            ) -> None:
        self._pool.run(jobs, concurrency=concurrency, on_outcome=on_outcome)

    def close(self) -> None:
        self._pool.close()

    def describe(self) -> dict[str, Any]:
        return {"name": self.name, "workers": self.workers,
                "start_method": self._pool.start_method}
