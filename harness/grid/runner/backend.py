"""The interface every execution backend offers the grid runner."""

from __future__ import annotations

from collections.abc import Callable, Sequence
from typing import Any, Protocol

from harness.grid.runner.jobs import Job

#: Called with each job and its outcome, in the order outcomes arrive.
OutcomeCallback = Callable[[Job, dict[str, Any]], None]


class Backend(Protocol):
    """Runs jobs and streams outcomes back.

    Attributes
    ----------
    name : str
        ``serial``, ``processes`` or ``dask``.
    workers : int
        Jobs that can run at once.
    shared : bool
        True when other clients may use the same workers (a joined Dask scheduler), so
        timings may have been taken alongside unknown work.
    """

    name: str
    workers: int
    shared: bool

    def run(self, jobs: Sequence[Job], *, concurrency: int, on_outcome: OutcomeCallback
            ) -> None:
        """Run ``jobs`` with at most ``concurrency`` at a time, calling ``on_outcome`` as
        each finishes. A worker that dies yields a ``failed`` outcome for its job; the
        other jobs continue. KeyboardInterrupt stops the work and propagates."""
        ...

    def close(self) -> None:
        """Release workers and connections."""
        ...

    def describe(self) -> dict[str, Any]:
        """Backend name, workers and settings, for run.json."""
        ...
