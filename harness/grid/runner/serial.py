"""Run jobs one after another in this process."""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

from harness.grid.runner.backend import OutcomeCallback
from harness.grid.runner.jobs import Job, execute


class SerialBackend:
    """In-process execution. A job that kills its process (os._exit, a segfault) kills
    the run too; use the processes or Dask backend to survive such plugins."""

    name = "serial"
    workers = 1
    shared = False

    def run(self, jobs: Sequence[Job], *, concurrency: int, on_outcome: OutcomeCallback
            ) -> None:
        for job in jobs:
            on_outcome(job, execute(job.to_dict()))

    def close(self) -> None:
        """Nothing to release."""

    def describe(self) -> dict[str, Any]:
        return {"name": self.name, "workers": self.workers}
