"""Run a grid of tasks on a backend, storing each outcome as it arrives, resumably.

Two stages:

1. accuracy work, in parallel on all workers;
2. timing work, one task at a time on an otherwise idle backend (``exclusive`` timing,
   the default), so that timings are not disturbed by concurrent tasks. A task whose
   case sets ``timing.exclusive = false`` is timed inside its accuracy job instead, and
   its record says how many tasks ran concurrently (with a warning).

Resume: a task whose record is complete (``harness.grid.store.task_records.is_complete``) is not
redone; a failed one is redone only with ``redo_failed``; one whose timing is pending is
only timed. Records are written atomically, so a run killed at any moment leaves every
file either absent or complete, and results.csv and timings.csv are rewritten (atomically)
after every task, so a killed run can be reported at once.

A run holds the directory's lock file (``harness.grid.store.run_lock``) from start to
end: a second run on the same directory is refused with the owner's process id, and a
lock left by a killed run is taken over. Every job carries a timeout
(``harness.grid.runner.deadlines``); the backends stop a job past it.
"""

from __future__ import annotations

import fnmatch
import logging
import time
from collections.abc import Callable, Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

from harness.grid.runner.backend import Backend
from harness.grid.runner.deadlines import task_timeout as timeout_of
from harness.grid.runner.jobs import Job
from harness.grid.store.environment import environment
from harness.grid.store.run_directory import OutputDirectoryError, RunStore
from harness.grid.store.run_lock import RunLock
from harness.grid.store.table_check import RESULTS_ROWS_KEY
from harness.grid.store.task_records import is_complete, new_record, now
from harness.grid.tasks import Task

logger = logging.getLogger(__name__)


@dataclass(frozen=True)
class GridEvent:
    """A progress event: ``kind`` is ``planned`` (``total`` jobs), ``done`` or ``stage``."""

    kind: str
    total: int = 0
    label: str = ""
    status: str = ""
    stage: str = ""

    def to_dict(self) -> dict[str, Any]:
        return {"kind": self.kind, "total": self.total, "label": self.label,
                "status": self.status, "stage": self.stage}


ProgressCallback = Callable[[GridEvent], None]


@dataclass(frozen=True)
class RunSummary:
    """Counts of one invocation of ``run_grid``."""

    tasks: int
    already_done: int
    kept_failed: int
    ran: int
    ok: int
    failed: int
    skipped: int
    timed: int
    timing_failed: int
    interrupted: bool
    seconds: float
    failures: tuple[str, ...] = field(default_factory=tuple)
    kept_failures: tuple[str, ...] = field(default_factory=tuple)

    @property
    def has_failures(self) -> bool:
        """Whether a task (or its timing) failed or timed out, now or in an earlier run."""
        return bool(self.failed or self.timing_failed or self.kept_failures)

    def to_dict(self) -> dict[str, Any]:
        out = dict(self.__dict__)
        out["failures"] = list(self.failures)
        out["kept_failures"] = list(self.kept_failures)
        return out


def select_tasks(tasks: Iterable[Task], patterns: Sequence[str] | None) -> list[Task]:
    """Tasks whose key or label matches any shell-style pattern (all when none given)."""
    tasks = list(tasks)
    if not patterns:
        return tasks
    return [t for t in tasks if any(fnmatch.fnmatchcase(t.key, p) or fnmatch.fnmatchcase(
        t.label, p) or p in t.label for p in patterns)]


class _Recorder:
    """Turns outcomes into stored records and counts them."""

    def __init__(self, store: RunStore, tasks: Mapping[str, Task], backend: Backend,
                 progress: ProgressCallback | None,
                 records: Mapping[str, Mapping[str, Any]] | None = None) -> None:
        self.store, self.tasks, self.backend, self.progress = store, tasks, backend, progress
        self.records: dict[str, Mapping[str, Any]] = dict(records or {})
        self.counts = {"ran": 0, "ok": 0, "failed": 0, "skipped": 0, "timed": 0,
                       "timing_failed": 0}
        self.failures: list[str] = []

    def _store(self, record: Mapping[str, Any]) -> None:
        """Write the task's record, then the tables of every record so far (atomically)."""
        self.store.write_record(record)
        self.records[record["key"]] = record
        self.store.write_tables(self.records.values())

    def _emit(self, label: str, status: str, stage: str) -> None:
        if self.progress is not None:
            self.progress(GridEvent(kind="done", label=label, status=status, stage=stage))

    def _timing_context(self, concurrent: int) -> dict[str, Any]:
        warnings: list[str] = []
        if concurrent > 1:
            warnings.append(
                f"timed while up to {concurrent} tasks ran concurrently "
                "(timing.exclusive = false): expect inflated, noisy times")
        if self.backend.shared:
            warnings.append("timed on a shared Dask cluster: other clients' work "
                            "may have run alongside")
        return {"concurrent_tasks": concurrent, "backend": self.backend.name,
                "shared_cluster": self.backend.shared, "warnings": warnings}

    def accuracy(self, job: Job, outcome: dict[str, Any]) -> None:
        task = self.tasks[job.key]
        record = new_record(job.key, job.label, job.task, status=outcome["status"],
                            started=outcome.get("started") or now())
        record["finished"] = outcome.get("finished") or now()
        record["worker"] = outcome.get("worker")
        record["environment"] = outcome.get("environment")
        record["result"] = outcome.get("result")
        record["error"] = outcome.get("error")
        record["skip_reason"] = outcome.get("skip_reason")
        if outcome["status"] == "ok" and task.timing:
            if "timing" in outcome:
                record["timing"] = outcome["timing"]
                record["timing_status"] = "ok"
                record["timing_context"] = self._timing_context(job.concurrency)
                for warning in record["timing_context"]["warnings"]:
                    logger.warning("%s: %s", job.label, warning)
                self.counts["timed"] += 1
            else:
                record["timing_status"] = "pending"
        self._store(record)
        self.counts["ran"] += 1
        self.counts[outcome["status"]] += 1
        if outcome["status"] == "failed":
            err = outcome.get("error") or {}
            self.failures.append(f"{job.label}: {err.get('type')}: {err.get('message')}")
        self._emit(job.label, outcome["status"], job.stage)

    def timing(self, job: Job, outcome: dict[str, Any]) -> None:
        record = self.store.read_record(job.key)
        if record is None:
            raise FileNotFoundError(f"{self.store.record_path(job.key)}: the accuracy record "
                                    "of a timed task vanished during the run")
        if outcome["status"] == "ok":
            record["timing"] = outcome.get("timing")
            record["timing_status"] = "ok"
            record["timing_error"] = None
            self.counts["timed"] += 1
        else:
            record["timing_status"] = "failed"
            record["timing_error"] = outcome.get("error") or {"type": "TaskSkipped",
                                                              "message": outcome.get(
                                                                  "skip_reason"),
                                                              "traceback": ""}
            self.counts["timing_failed"] += 1
            err = record["timing_error"]
            self.failures.append(f"{job.label} (timing): {err.get('type')}: "
                                 f"{err.get('message')}")
        record["timing_context"] = self._timing_context(job.concurrency)
        self._store(record)
        self._emit(job.label, "ok" if outcome["status"] == "ok" else "failed", "timing")


def _needs_timing(record: Mapping[str, Any] | None) -> bool:
    return (record is not None and record.get("status") == "ok"
            and record.get("timing_status") in ("pending", "failed"))


def plan(tasks: Sequence[Task], existing: Mapping[str, Mapping[str, Any]], *,
         redo_failed: bool, workers: int, timeout: float | None = None
         ) -> tuple[list[Job], list[Job], int, int]:
    """Accuracy jobs, timing jobs, and the counts of tasks already done / failures kept.

    ``timeout`` overrides every task's timeout (``harness.grid.runner.deadlines``)."""
    accuracy: list[Job] = []
    timing: list[Job] = []
    done = kept = 0
    for task in tasks:
        record = existing.get(task.key)
        inline = task.timing and not task.exclusive_timing
        stage = "accuracy+timing" if inline else "accuracy"
        width = workers if inline else 1
        limit = timeout_of(task, override=timeout)
        acc_job = Job(key=task.key, label=task.label, stage=stage, task=task.to_dict(),
                      concurrency=width, timeout=limit)
        time_job = Job(key=task.key, label=task.label, stage="timing", task=task.to_dict(),
                       timeout=limit)
        if record is None:
            accuracy.append(acc_job)
            if task.timing and not inline:
                timing.append(time_job)
        elif is_complete(record):
            done += 1
        elif record["status"] == "failed":
            if redo_failed:
                accuracy.append(acc_job)
                if task.timing and not inline:
                    timing.append(time_job)
            else:
                kept += 1
        elif record.get("timing_status") == "pending" or (
                record.get("timing_status") == "failed" and redo_failed):
            timing.append(time_job)
        else:
            kept += 1
    return accuracy, timing, done, kept


def kept_failures(tasks: Sequence[Task], existing: Mapping[str, Mapping[str, Any]], *,
                  redo_failed: bool) -> tuple[str, ...]:
    """One line per failure of an earlier run that this run keeps (not ``redo_failed``).

    Parameters
    ----------
    tasks : sequence of Task
        The tasks of this run.
    existing : mapping
        The records on disk, by key.
    redo_failed : bool
        Whether this run redoes failed tasks and timings (then nothing is kept).

    Returns
    -------
    tuple of str
        ``label: ErrorType: message (an earlier run; --redo-failed redoes it)``.
    """
    if redo_failed:
        return ()
    lines = []
    for task in tasks:
        record = existing.get(task.key)
        if record is None or is_complete(record):
            continue
        if record.get("status") == "failed":
            error, what = record.get("error") or {}, ""
        elif record.get("timing_status") == "failed":
            error, what = record.get("timing_error") or {}, " (timing)"
        else:
            continue
        lines.append(f"{record.get('label', task.label)}{what}: {error.get('type')}: "
                     f"{error.get('message')} (an earlier run; --redo-failed redoes it)")
    return tuple(lines)


def run_grid(tasks: Sequence[Task], store: RunStore, backend: Backend, *,
             redo_failed: bool = False, progress: ProgressCallback | None = None,
             case_file: str | None = None, case_text: str | None = None,
             case_info: Mapping[str, Any] | None = None,
             task_timeout: float | None = None) -> RunSummary:
    """Run every task not yet complete in ``store`` (module docstring).

    Raises ``harness.grid.store.RunDirectoryLocked`` when another live run holds the
    directory. ``task_timeout`` (seconds) overrides every task's own timeout.
    """
    store.prepare()
    with RunLock(store.path):
        return _run_locked(tasks, store, backend, redo_failed=redo_failed,
                           progress=progress, case_file=case_file, case_text=case_text,
                           case_info=case_info, task_timeout=task_timeout)


def _run_locked(tasks: Sequence[Task], store: RunStore, backend: Backend, *,
                redo_failed: bool, progress: ProgressCallback | None,
                case_file: str | None, case_text: str | None,
                case_info: Mapping[str, Any] | None, task_timeout: float | None
                ) -> RunSummary:
    start = time.perf_counter()
    store.remove_stale_temporaries()
    existing = store.records()
    by_key = {t.key: t for t in tasks}
    accuracy, timing, done, kept = plan(tasks, existing, redo_failed=redo_failed,
                                        workers=backend.workers, timeout=task_timeout)
    if progress is not None:
        progress(GridEvent(kind="planned", total=len(accuracy) + len(timing)))
    run_info: dict[str, Any] = {
        "case_file": case_file, "case_text": case_text, "case": dict(case_info or {}),
        "backend": backend.describe(),
        "started": now(), "status": "running", "tasks": len(tasks),
        "environment": environment(case_file),
    }
    previous = store.read_run()
    if previous is not None:
        run_info["previous_runs"] = [*previous.get("previous_runs", []),
                                     {k: previous.get(k) for k in ("started", "finished",
                                                                   "status", "backend")}]
    store.write_run(run_info)
    recorder = _Recorder(store, by_key, backend, progress, existing)
    store.write_tables(existing.values())
    kept_lines = kept_failures(tasks, existing, redo_failed=redo_failed)
    interrupted = unwritable = False
    try:
        if accuracy:
            if progress is not None:
                progress(GridEvent(kind="stage", stage="accuracy", total=len(accuracy)))
            backend.run(accuracy, concurrency=backend.workers, on_outcome=recorder.accuracy)
        ready = [job for job in timing if _needs_timing(store.read_record(job.key))]
        if ready:
            if progress is not None:
                progress(GridEvent(kind="stage", stage="timing", total=len(ready)))
            backend.run(ready, concurrency=1, on_outcome=recorder.timing)
        skipped_timing = len(timing) - len(ready)
        if progress is not None and skipped_timing:
            for _ in range(skipped_timing):
                progress(GridEvent(kind="done", status="not timed", stage="timing"))
    except KeyboardInterrupt:
        interrupted = True
        raise
    except OutputDirectoryError:
        unwritable = True  # the tables and run.json would fail the same way
        raise
    finally:
        if not unwritable:
            rows = store.write_tables()
            c = recorder.counts
            summary = RunSummary(
                tasks=len(tasks), already_done=done, kept_failed=kept, ran=c["ran"],
                ok=c["ok"], failed=c["failed"], skipped=c["skipped"], timed=c["timed"],
                timing_failed=c["timing_failed"], interrupted=interrupted,
                seconds=time.perf_counter() - start, failures=tuple(recorder.failures),
                kept_failures=kept_lines)
            run_info.update({"finished": now(), "status": "interrupted" if interrupted
                             else "complete", "summary": summary.to_dict(),
                             RESULTS_ROWS_KEY: rows})
            store.write_run(run_info)
    return summary
