"""Run jobs on a Dask distributed cluster: a LocalCluster started here, or a scheduler.

Jobs are submitted with ``pure=False`` and a unique key each: ``Client.submit``'s default
``pure=True`` hashes the function and arguments, and two equal jobs would be merged into
one. Outcomes stream back with ``distributed.as_completed`` and are stored as they arrive.

A worker process that dies (os._exit, a segfault) is restarted by its nanny; the
scheduler then reports the task as ``KilledWorker`` once it has killed
``distributed.scheduler.allowed-failures`` + 1 workers. A LocalCluster started here
sets that to 0, so a crashing job fails at once; a joined scheduler keeps its own setting.
Timing jobs (concurrency 1) are submitted one at a time.

Without Dask, or with a scheduler that does not answer, the backend is not made: a
one-line ``harness.grid.runner.dask_check.DaskUnavailableError`` says why.
"""

from __future__ import annotations

import logging
import uuid
from collections.abc import Sequence
from typing import Any

from harness.grid.runner.backend import OutcomeCallback
from harness.grid.runner.dask_check import connect_scheduler, import_distributed
from harness.grid.runner.jobs import Job, crash_outcome, execute


class DaskBackend:
    """A Dask client on a new LocalCluster (``local_workers``) or a scheduler ``address``."""

    name = "dask"

    def __init__(self, *, local_workers: int | None = None, address: str | None = None,
                 processes: bool = True) -> None:
        if (local_workers is None) == (address is None):
            raise ValueError("give exactly one of local_workers (--dask-local N) and address "
                             "(--scheduler ADDRESS)")
        distributed = import_distributed(
            option="--scheduler" if address is not None else "--dask-local")
        import dask

        self._cluster = None
        if address is not None:
            self.client = connect_scheduler(address)
            self.shared = True
            self.address = address
            info = self.client.scheduler_info()
            self.workers = max(1, sum(int(w.get("nthreads", 1))
                                      for w in info.get("workers", {}).values()))
        else:
            if local_workers is None or local_workers < 1:
                raise ValueError(f"--dask-local must be >= 1, got {local_workers}")
            with dask.config.set({"distributed.scheduler.allowed-failures": 0}):
                self._cluster = distributed.LocalCluster(
                    n_workers=local_workers, threads_per_worker=1, processes=processes,
                    memory_limit=0, dashboard_address=None, silence_logs=logging.ERROR)
                self.client = distributed.Client(self._cluster)
            self.shared = False
            self.address = self._cluster.scheduler_address
            self.workers = local_workers

    def _submit(self, job: Job) -> Any:
        key = f"covaudit-{job.stage}-{job.key}-{uuid.uuid4().hex[:8]}"
        return self.client.submit(execute, job.to_dict(), key=key, pure=False, retries=0)

    def _outcome(self, job: Job, future: Any) -> dict[str, Any]:
        from distributed.scheduler import KilledWorker

        try:
            return future.result()
        except KilledWorker as exc:
            return crash_outcome(job, f"the Dask worker running this task died ({exc}); a "
                                      "segfault, os._exit or the out-of-memory killer are the "
                                      "usual causes", error_type="KilledWorker")
        except Exception as exc:  # noqa: BLE001 - a lost or undeserializable task is a failure
            return crash_outcome(job, f"Dask could not run this task: {exc}",
                                 error_type=type(exc).__name__)

    def run(self, jobs: Sequence[Job], *, concurrency: int, on_outcome: OutcomeCallback
            ) -> None:
        from distributed import as_completed

        if concurrency <= 1:
            for job in jobs:
                future = self._submit(job)
                try:
                    on_outcome(job, self._outcome(job, future))
                except BaseException:
                    future.cancel()
                    raise
            return
        futures = {}
        for job in jobs:
            futures[self._submit(job)] = job
        try:
            for future in as_completed(list(futures)):
                on_outcome(futures[future], self._outcome(futures[future], future))
        except BaseException:
            self.client.cancel(list(futures))
            raise

    def close(self) -> None:
        self.client.close()
        if self._cluster is not None:
            self._cluster.close()

    def describe(self) -> dict[str, Any]:
        return {"name": self.name, "workers": self.workers, "address": self.address,
                "local_cluster": self._cluster is not None}
