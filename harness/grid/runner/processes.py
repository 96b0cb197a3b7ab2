"""Run jobs on local worker processes (``concurrent.futures.ProcessPoolExecutor``).

Workers are started with the ``spawn`` method (numba's and OpenMP's thread pools are not
safe across ``fork``) and ignore SIGINT, so Ctrl-C reaches only the parent, which stops
them. Each job limits its own BLAS threads (``harness.grid.runner.jobs.limited_threads``).

A worker that dies breaks the whole pool (every running future fails with
``BrokenProcessPool``), which does not say whose job killed it. Jobs are therefore
submitted in a window of at most ``concurrency``; when the pool breaks, the jobs in that
window become suspects and are rerun one at a time in a fresh single-worker pool. A job
that breaks the pool alone is recorded as failed (``WorkerCrashed``); the others
complete normally, and the grid goes on.
"""

from __future__ import annotations

import multiprocessing
import signal
from collections import deque
from collections.abc import Sequence
from concurrent.futures import FIRST_COMPLETED, Future, ProcessPoolExecutor, wait
from concurrent.futures.process import BrokenProcessPool
from typing import Any

from harness.grid.runner.backend import OutcomeCallback
from harness.grid.runner.jobs import Job, crash_outcome, execute


def _ignore_sigint() -> None:
    signal.signal(signal.SIGINT, signal.SIG_IGN)


def _stop(pool: ProcessPoolExecutor) -> None:
    """Cancel queued work and end this pool's worker processes (ones we started)."""
    processes = list(getattr(pool, "_processes", {}).values())
    pool.shutdown(wait=False, cancel_futures=True)
    for process in processes:
        if process.is_alive():
            process.terminate()
    for process in processes:
        process.join(timeout=5)


class ProcessBackend:
    """``workers`` local processes (see module docstring)."""

    name = "processes"
    shared = False

    def __init__(self, workers: int) -> None:
        if workers < 1:
            raise ValueError(f"--workers must be >= 1, got {workers}")
        self.workers = int(workers)
        self._context = multiprocessing.get_context("spawn")

    def _pool(self, width: int) -> ProcessPoolExecutor:
        return ProcessPoolExecutor(max_workers=width, mp_context=self._context,
                                   initializer=_ignore_sigint)

    def run(self, jobs: Sequence[Job], *, concurrency: int, on_outcome: OutcomeCallback
            ) -> None:
        width = max(1, min(self.workers, concurrency, len(jobs) or 1))
        queue = deque(jobs)
        while queue:
            suspects = self._run_window(queue, width, on_outcome)
            for job in suspects:
                self._run_alone(job, on_outcome)

    def _run_window(self, queue: deque[Job], width: int, on_outcome: OutcomeCallback
                    ) -> list[Job]:
        """Run queued jobs until done or the pool breaks; returns the suspects."""
        pool = self._pool(width)
        running: dict[Future, Job] = {}
        try:
            while queue or running:
                while queue and len(running) < width:
                    job = queue.popleft()
                    running[pool.submit(execute, job.to_dict())] = job
                done, _ = wait(running, return_when=FIRST_COMPLETED)
                broken = False
                for future in done:
                    job = running.pop(future)
                    try:
                        on_outcome(job, future.result())
                    except BrokenProcessPool:
                        broken = True
                        running[future] = job
                if broken:
                    suspects = list(running.values())
                    _stop(pool)
                    return suspects
        except BaseException:
            _stop(pool)
            raise
        pool.shutdown(wait=True)
        return []

    def _run_alone(self, job: Job, on_outcome: OutcomeCallback) -> None:
        pool = self._pool(1)
        try:
            outcome = pool.submit(execute, job.to_dict()).result()
        except BrokenProcessPool as exc:
            outcome = crash_outcome(job, f"the worker process died while running this task "
                                         f"alone ({exc}); a segfault, os._exit or the "
                                         "out-of-memory killer are the usual causes")
        except BaseException:
            _stop(pool)
            raise
        _stop(pool)
        on_outcome(job, outcome)

    def close(self) -> None:
        """Pools are per run; nothing stays open."""

    def describe(self) -> dict[str, Any]:
        return {"name": self.name, "workers": self.workers, "start_method": "spawn"}
