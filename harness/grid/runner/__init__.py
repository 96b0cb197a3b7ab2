"""Execution of task grids: serial, local processes, or Dask, behind one interface."""

from harness.grid.runner.backend import Backend, OutcomeCallback
from harness.grid.runner.grid_run import GridEvent, RunSummary, run_grid, select_tasks
from harness.grid.runner.jobs import Job, execute
from harness.grid.runner.processes import ProcessBackend
from harness.grid.runner.serial import SerialBackend


def make_backend(*, workers: int | None = None, dask_local: int | None = None,
                 scheduler: str | None = None) -> Backend:
    """The backend the command-line options ask for.

    ``workers`` > 1 gives local processes; ``workers`` == 1 or nothing runs serially;
    ``dask_local`` starts a LocalCluster with that many single-threaded workers;
    ``scheduler`` joins an existing Dask scheduler. At most one may be given.
    """
    given = [x is not None for x in (workers, dask_local, scheduler)]
    if sum(given) > 1:
        raise ValueError("choose one of --workers, --dask-local and --scheduler")
    if dask_local is not None or scheduler is not None:
        from harness.grid.runner.dask_backend import DaskBackend

        return DaskBackend(local_workers=dask_local, address=scheduler)
    if workers is not None and workers > 1:
        return ProcessBackend(workers)
    if workers is not None and workers < 1:
        raise ValueError(f"--workers must be >= 1, got {workers}")
    return SerialBackend()


__all__ = [
    "Backend",
    "GridEvent",
    "Job",
    "OutcomeCallback",
    "ProcessBackend",
    "RunSummary",
    "SerialBackend",
    "execute",
    "make_backend",
    "run_grid",
    "select_tasks",
]
