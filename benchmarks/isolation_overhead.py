"""What running every task in a child process costs, and how long the fault suite takes.

Measured in one run, beside the same-run unit of ``machine_unit`` (one dpotrf at
n = 8,192):

- worker start-up: seconds from starting a ``WorkerPool`` worker (spawn) until it is
  ready (imports done), median of ``REPEATS``; paid once per worker, not per task;
- per-task round trip on a warm worker: a trivial job (a task that fails validation at
  once) sent and answered, median over ``JOBS`` jobs;
- the serial smoke grid (``cases/smoke.toml``, 6 tasks with timing) run by ``covaudit
  run`` in a fresh process, wall seconds;
- the fault-and-bad-input suite ``tests/test_faults.py`` under pytest, wall seconds
  (issue 12 asks for under 3 minutes).

Run from the repository root: ``python benchmarks/isolation_overhead.py``; writes
``benchmarks/results/isolation_overhead.json``. Timings taken on a shared machine: the
load average is recorded beside them.
"""

from __future__ import annotations

import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))

from machine_unit import commit, machine, measure_unit, median, write_results  # noqa: E402

REPEATS = 3
JOBS = 20
OUT = "benchmarks/results/isolation_overhead.json"


def worker_startup() -> list[float]:
    from harness.grid.runner.workers import READY, WorkerPool

    times = []
    for _ in range(REPEATS):
        pool = WorkerPool(1, echo_stderr=False)
        start = time.perf_counter()
        worker = pool._start()
        if worker.conn.recv() != READY:
            raise RuntimeError("worker did not report ready")
        times.append(time.perf_counter() - start)
        worker.ready = True
        pool._idle.append(worker)
        pool.close()
    return times


def round_trips() -> list[float]:
    from harness.grid.runner.jobs import Job
    from harness.grid.runner.workers import WorkerPool

    pool = WorkerPool(1, echo_stderr=False)
    bad = Job(key="k", label="invalid", stage="accuracy", task={"not": "a task"})
    pool.run([bad], concurrency=1, on_outcome=lambda job, outcome: None)  # warm
    times = []
    for _ in range(JOBS):
        start = time.perf_counter()
        pool.run([bad], concurrency=1, on_outcome=lambda job, outcome: None)
        times.append(time.perf_counter() - start)
    pool.close()
    return times


def timed(command: list[str], *, scratch: str | None = None) -> dict:
    """Run ``command``; the record names it without this machine's paths (the
    interpreter as ``python``, a scratch folder as ``$TMP``)."""
    start = time.perf_counter()
    proc = subprocess.run(command, capture_output=True, text=True, check=False)
    shown = " ".join("python" if part == sys.executable else part for part in command)
    if scratch:
        shown = shown.replace(scratch, "$TMP")
    return {"command": shown, "seconds": time.perf_counter() - start,
            "exit_code": proc.returncode,
            "last_line": (proc.stdout.strip().splitlines() or [""])[-1]}


def main() -> None:
    unit = measure_unit()
    startup = worker_startup()
    trips = round_trips()
    with tempfile.TemporaryDirectory() as folder:
        smoke = timed([sys.executable, "-c", "import sys; from harness.cli import main; "
                       "sys.exit(main())", "run", "cases/smoke.toml", "--out",
                       os.path.join(folder, "smoke")], scratch=folder)
    faults = timed([sys.executable, "-m", "pytest", "-q", "-p", "no:cacheprovider", "-n", "0",
                    "tests/test_faults.py"])
    payload = {
        "benchmark": "isolation_overhead", "commit": commit(), "machine": machine(),
        "unit": unit,
        "worker_startup_seconds": {"median": median(startup), "samples": startup},
        "warm_round_trip_seconds": {"median": median(trips), "samples": trips},
        "serial_smoke_grid": smoke, "fault_suite": faults,
        "in_units": {"worker_startup": median(startup) / unit["seconds"],
                     "warm_round_trip": median(trips) / unit["seconds"],
                     "serial_smoke_grid": smoke["seconds"] / unit["seconds"],
                     "fault_suite": faults["seconds"] / unit["seconds"]},
        "load_average_after": list(os.getloadavg()),
    }
    write_results(OUT, payload)
    print(f"unit {unit['seconds']:.3f} s; worker start-up {median(startup):.2f} s; warm "
          f"round trip {median(trips) * 1e3:.1f} ms; smoke {smoke['seconds']:.1f} s; "
          f"fault suite {faults['seconds']:.1f} s ({faults['last_line']}) -> {OUT}")


if __name__ == "__main__":
    main()
