"""Run jobs one after another, each in a reused child process (not in this process)."""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

from harness.grid.runner.backend import OutcomeCallback
from harness.grid.runner.jobs import Job
from harness.grid.runner.workers import WorkerPool


class SerialBackend:
    """One job at a time on one worker process (``harness.grid.runner.workers``), so a
    job that aborts, segfaults or hangs is recorded as a failed task and the run goes on."""

    name = "serial"
    workers = 1
    shared = False

    def __init__(self) -> None:
        self._pool = WorkerPool(1)

    def run(self, jobs: Sequence[Job], *, concurrency: int, on_outcome: OutcomeCallback
            ) -> None:
        self._pool.run(jobs, concurrency=1, on_outcome=on_outcome)

    def close(self) -> None:
        self._pool.close()

    def describe(self) -> dict[str, Any]:
        return {"name": self.name, "workers": self.workers, "isolation": "child process",
                "start_method": self._pool.start_method}
