"""Reusable child processes that run jobs one at a time each, isolated from the parent.

Every backend on this machine (serial included: serial means one at a time, not in this
process) runs its jobs here, so a plugin that aborts, segfaults or never returns costs
one task, not the run:

- a worker that dies is recorded as a failed task (``WorkerCrashed``) with the signal or
  exit status and the last lines it wrote to standard error; a fresh worker replaces it
  and the grid goes on;
- a job that runs past its deadline (``Job.timeout`` seconds) has its worker killed and
  is recorded as failed with ``TaskTimeout``;
- workers die with their parent: on Linux each asks the kernel for SIGKILL when its
  parent dies (``prctl(PR_SET_PDEATHSIG)``, prctl(2)), and everywhere a watchdog thread
  exits the worker when its parent process changes (an orphan is re-parented);
- workers ignore SIGINT, so Ctrl-C reaches only the parent, which stops them.

Workers are forked from multiprocessing's fork server, as the guarded children of
``harness.infra.child_process`` are (``start_context``: a clean single-threaded process
that has imported numpy, numba and the audit code but started no numba or OpenMP thread
pool, so forking it is safe where forking this process would not be), or started with
``spawn`` where a load-time variable differs from the server's; they take the environment
of the pool's process when they start. They are reused across jobs, so what start-up
costs is paid once per worker, not per task. A worker's standard error goes to a file;
what a job wrote there is passed on to the parent's standard error after the job, and its
tail is kept for crash records.
"""

from __future__ import annotations

import contextlib
import os
import shutil
import signal
import sys
import tempfile
import time
from collections import deque
from collections.abc import Sequence
from dataclasses import dataclass, field
from multiprocessing.connection import Connection, wait
from pathlib import Path
from typing import Any

from harness.grid.runner.backend import OutcomeCallback
from harness.grid.runner.jobs import Job, crash_outcome, execute
from harness.infra.child_process import (
    READY,
    enter_child,
    signal_description,
    start_context,
    stderr_tail,
)

#: The module a worker imports before it reports ready (the fork server preloads it).
_WORKER_IMPORTS = "harness.audit.task_audit"


def _worker_main(conn: Connection, stderr_path: str, parent: int | None,
                 environment: dict[str, str]) -> None:
    """Body of a worker process: receive job dicts, send outcomes, until None or EOF."""
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    enter_child(parent, environment)
    fd = os.open(stderr_path, os.O_WRONLY | os.O_CREAT | os.O_APPEND, 0o600)
    os.dup2(fd, 2)
    os.close(fd)
    import faulthandler

    faulthandler.enable(file=sys.stderr, all_threads=False)
    import harness.audit.task_audit  # noqa: F401 - _WORKER_IMPORTS, before the clock starts

    conn.send(READY)
    while True:
        try:
            job = conn.recv()
        except (EOFError, OSError):
            return
        if job is None:
            return
        outcome = execute(job)
        sys.stderr.flush()
        conn.send(outcome)


@dataclass
class _Worker:
    process: Any
    conn: Connection
    stderr_path: Path
    job: Job | None = None
    ready: bool = False
    deadline: float = float("inf")
    offset: int = 0
    jobs_done: int = 0
    tail: list[str] = field(default_factory=list)


class WorkerPool:
    """Up to ``size`` worker processes, started on demand and reused (module docstring).

    Parameters
    ----------
    size : int
        Workers that may run at once (>= 1).
    echo_stderr : bool
        Pass what a job wrote to standard error on to this process's standard error.
    """

    def __init__(self, size: int, *, echo_stderr: bool = True) -> None:
        if size < 1:
            raise ValueError(f"worker pool size must be >= 1, got {size}")
        self.size = int(size)
        self.echo_stderr = echo_stderr
        self._context, self._forked = start_context(_WORKER_IMPORTS)
        self._idle: list[_Worker] = []
        self._dir: Path | None = None
        self._count = 0

    @property
    def start_method(self) -> str:
        """``forkserver`` or ``spawn``: how this pool's workers start (module docstring)."""
        return "forkserver" if self._forked else "spawn"

    # -- workers ---------------------------------------------------------------------
    def _start(self) -> _Worker:
        if self._dir is None:
            self._dir = Path(tempfile.mkdtemp(prefix="covaudit-workers-"))
        self._count += 1
        path = self._dir / f"worker-{self._count}.stderr"
        path.touch()
        parent_conn, child_conn = self._context.Pipe(duplex=True)
        process = self._context.Process(target=_worker_main,
                                        name=f"covaudit-worker-{self._count}",
                                        args=(child_conn, str(path),
                                              None if self._forked else os.getpid(),
                                              dict(os.environ)),
                                        daemon=True)
        process.start()
        child_conn.close()
        return _Worker(process=process, conn=parent_conn, stderr_path=path)

    def _acquire(self) -> _Worker:
        while self._idle:
            worker = self._idle.pop()
            if worker.process.is_alive():
                return worker
            self._discard(worker)
        return self._start()

    def _stderr_since(self, worker: _Worker) -> str:
        try:
            with open(worker.stderr_path, "rb") as handle:
                handle.seek(worker.offset)
                data = handle.read()
        except OSError:
            return ""
        worker.offset += len(data)
        return data.decode("utf-8", errors="replace")

    def _pass_on(self, worker: _Worker) -> str:
        text = self._stderr_since(worker)
        if text and self.echo_stderr:
            sys.stderr.write(text)
            sys.stderr.flush()
        return text

    def _discard(self, worker: _Worker) -> None:
        with contextlib.suppress(OSError):
            worker.conn.close()
        if worker.process.is_alive():
            worker.process.kill()
        worker.process.join(timeout=5)
        with contextlib.suppress(OSError):
            worker.stderr_path.unlink()

    # -- jobs ------------------------------------------------------------------------
    @staticmethod
    def _deadline(worker: _Worker) -> float:
        """When the worker's job times out: its timeout after the worker is ready (a
        fresh worker's start-up does not count)."""
        job = worker.job
        if job is None or not job.timeout or not worker.ready:
            return float("inf")
        return time.monotonic() + job.timeout

    def _crash(self, worker: _Worker, job: Job) -> dict[str, Any]:
        worker.process.join(timeout=5)
        text = self._pass_on(worker)
        lines = stderr_tail(text)
        how = signal_description(worker.process.exitcode)
        message = (f"the worker process running this task {how}; a crashing plugin "
                   "(os.abort, a segfault), os._exit or the out-of-memory killer are the "
                   "usual causes")
        if lines:
            message += "; last standard-error lines:\n" + "\n".join(lines)
        outcome = crash_outcome(job, message)
        outcome["error"]["signal"] = (-worker.process.exitcode
                                      if (worker.process.exitcode or 0) < 0 else None)
        outcome["error"]["exitcode"] = worker.process.exitcode
        outcome["error"]["stderr_tail"] = lines
        return outcome

    def _timeout(self, worker: _Worker, job: Job) -> dict[str, Any]:
        worker.process.kill()
        worker.process.join(timeout=5)
        self._pass_on(worker)
        return crash_outcome(job, f"ran longer than its timeout of {job.timeout:g} s and was "
                                  "stopped (set --task-timeout or [timing] timeout in the "
                                  "case file to allow longer)", error_type="TaskTimeout")

    def run(self, jobs: Sequence[Job], *, concurrency: int, on_outcome: OutcomeCallback
            ) -> None:
        """Run ``jobs`` on at most ``min(size, concurrency)`` workers, calling
        ``on_outcome(job, outcome)`` as each finishes, crashes or times out."""
        width = max(1, min(self.size, concurrency))
        queue = deque(jobs)
        busy: list[_Worker] = []
        try:
            while queue or busy:
                while queue and len(busy) < width:
                    job = queue.popleft()
                    worker = self._acquire()
                    worker.job = job
                    worker.deadline = self._deadline(worker)
                    worker.conn.send(job.to_dict())
                    busy.append(worker)
                soonest = min(w.deadline for w in busy)
                wait_for = None if soonest == float("inf") else max(0.0, soonest
                                                                    - time.monotonic())
                handles: list[Any] = [w.conn for w in busy] + [w.process.sentinel
                                                               for w in busy]
                ready = set(wait(handles, timeout=wait_for))
                for worker in list(busy):
                    current = worker.job
                    if current is None:  # pragma: no cover - a busy worker always has a job
                        continue
                    job = current
                    outcome: dict[str, Any] | None = None
                    keep = False
                    if worker.conn in ready:
                        try:
                            message = worker.conn.recv()
                        except (EOFError, OSError):
                            outcome = self._crash(worker, job)
                        else:
                            if message == READY:  # start-up done: the clock starts now
                                worker.ready = True
                                worker.deadline = self._deadline(worker)
                                continue
                            outcome, keep = message, True
                            self._pass_on(worker)
                    elif worker.process.sentinel in ready:
                        outcome = self._crash(worker, job)
                    elif time.monotonic() >= worker.deadline:
                        outcome = self._timeout(worker, job)
                    if outcome is None:
                        continue
                    busy.remove(worker)
                    worker.job = None
                    if keep:
                        worker.jobs_done += 1
                        self._idle.append(worker)
                    else:
                        self._discard(worker)
                    on_outcome(job, outcome)
        except BaseException:
            for worker in busy:
                self._discard(worker)
            raise

    def close(self) -> None:
        """Stop every worker and remove their standard-error files."""
        for worker in self._idle:
            with contextlib.suppress(OSError, BrokenPipeError):
                worker.conn.send(None)
        for worker in self._idle:
            worker.process.join(timeout=2)
            self._discard(worker)
        self._idle = []
        if self._dir is not None:
            shutil.rmtree(self._dir, ignore_errors=True)
            self._dir = None

    def __del__(self) -> None:  # pragma: no cover - best effort at interpreter exit
        with contextlib.suppress(Exception):
            self.close()
