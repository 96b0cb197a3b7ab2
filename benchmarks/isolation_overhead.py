"""What running every task, and every solver call of a check, in a child process costs.

Measured in one run, beside the same-run unit of ``machine_unit`` (one dpotrf at
n = 8,192):

- worker start-up: seconds from starting a ``WorkerPool`` worker (spawn) until it is
  ready (imports done), median of ``REPEATS``; paid once per worker, not per task;
- per-task round trip on a warm worker: a trivial job (a task that fails validation at
  once) sent and answered, median over ``JOBS`` jobs;
- the overhead of isolation on the demo (``covaudit demo``: every call into the built-in
  solver under test in a child process, ``harness.check.plugin_guard``) and on the smoke
  case (``covaudit run cases/smoke.toml``: every task in a worker process), each run in
  a fresh process isolated and in process, alternately, ``--repeats`` times; the
  overhead is (median isolated - median in process) / median in process. In process
  means, for the demo, the internal switch ``COVAUDIT_BENCHMARK_BUILTINS_IN_PROCESS=1``
  (``harness.check.plugin_guard.IN_PROCESS_VARIABLE``, for this benchmark only) and, for
  the smoke case, the same ``covaudit run`` with its jobs executed in the calling process
  by a backend defined here (``_IN_PROCESS_RUN``; ``run`` itself has no such mode). The
  script exits with status 1 when either overhead is ``LIMIT`` (10%) or more;
- the fault-and-bad-input suite ``tests/test_faults.py`` under pytest, wall seconds
  (issue 12 asks for under 3 minutes; not with ``--quick``).

Run from the repository root: ``python benchmarks/isolation_overhead.py`` (the demo takes
about 9 minutes a run, so the full benchmark takes over an hour); writes
``benchmarks/results/isolation_overhead.json``. ``--quick`` checks that the script works
in minutes: one repeat of each, the demo at ``QUICK_DEMO_N`` points and the smoke case at
its smallest size, written to ``--json`` only when given. Timings taken on a shared
machine: the load average is recorded beside them.
"""

from __future__ import annotations

import argparse
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
#: The largest overhead of isolation accepted, as a fraction of the in-process time.
LIMIT = 0.10
#: Points of the demo with ``--quick`` (the default demo has 20,000 or so).
QUICK_DEMO_N = 400
#: The benchmark's in-process switch of ``check`` (harness.check.plugin_guard).
IN_PROCESS_VARIABLE = "COVAUDIT_BENCHMARK_BUILTINS_IN_PROCESS"
#: ``covaudit run`` with every job executed in this process (the smoke case's in-process
#: variant; the runner's own backends always use worker processes).
_IN_PROCESS_RUN = """
import sys
import harness.grid.runner as runner
from harness.grid.runner.jobs import execute

class InProcess:
    name, workers, shared = "serial", 1, False
    def run(self, jobs, *, concurrency, on_outcome):
        for job in jobs:
            on_outcome(job, execute(job.to_dict()))
    def close(self):
        pass
    def describe(self):
        return {"name": self.name, "workers": 1, "isolation": "none (benchmark)"}

runner.make_backend = lambda **kwargs: InProcess()
from harness.cli import main
sys.exit(main(sys.argv[1:]))
"""


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


def timed(command: list[str], *, scratch: str | None = None,
          env: dict[str, str] | None = None) -> dict:
    """Run ``command``; the record names it without this machine's paths (the
    interpreter as ``python``, a scratch folder as ``$TMP``; a program given with ``-c``
    as ``<code>``)."""
    start = time.perf_counter()
    proc = subprocess.run(command, capture_output=True, text=True, check=False, env=env)
    shown = " ".join("python" if part == sys.executable else
                     "<code>" if "\n" in part else part for part in command)
    last_line = (proc.stdout.strip().splitlines() or [""])[-1]
    if scratch:
        shown = shown.replace(scratch, "$TMP")
        last_line = last_line.replace(scratch, "$TMP")
    return {"command": shown, "seconds": time.perf_counter() - start,
            "exit_code": proc.returncode, "last_line": last_line}


def _covaudit(arguments: list[str], *, in_process: bool, smoke: bool) -> list[str]:
    if smoke and in_process:
        return [sys.executable, "-c", _IN_PROCESS_RUN, *arguments]
    return [sys.executable, "-c", "import sys; from harness.cli import main; "
            "sys.exit(main())", *arguments]


def overhead(name: str, arguments: list[str], folder: str, *, repeats: int,
             smoke: bool) -> dict:
    """Isolated against in process (module docstring), alternately, ``repeats`` times."""
    runs: dict[str, list[dict]] = {"isolated": [], "in_process": []}
    for index in range(repeats):
        for mode in ("isolated", "in_process"):
            out = os.path.join(folder, f"{name}-{mode}-{index}")
            env = dict(os.environ)
            env.pop(IN_PROCESS_VARIABLE, None)
            if mode == "in_process" and not smoke:
                env[IN_PROCESS_VARIABLE] = "1"
            command = _covaudit([*arguments, "--out", out], in_process=mode == "in_process",
                                smoke=smoke)
            record = timed(command, scratch=folder, env=env)
            if record["exit_code"] not in (0, 1):
                raise RuntimeError(f"{name} ({mode}) exited with {record['exit_code']}: "
                                   f"{record['last_line']}")
            runs[mode].append(record)
    isolated = median([r["seconds"] for r in runs["isolated"]])
    in_process = median([r["seconds"] for r in runs["in_process"]])
    return {"isolated_seconds": isolated, "in_process_seconds": in_process,
            "overhead": (isolated - in_process) / in_process, "runs": runs}


def _quick_smoke(folder: str) -> str:
    """``cases/smoke.toml`` at its smallest size only, with one timing repeat."""
    text = Path("cases/smoke.toml").read_text(encoding="utf-8")
    text = text.replace("sizes = [300, 600]", "sizes = [300]").replace("repeats = 2",
                                                                        "repeats = 1")
    path = os.path.join(folder, "smoke-quick.toml")
    Path(path).write_text(text, encoding="utf-8")
    return path


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true",
                        help=f"one repeat, the demo at {QUICK_DEMO_N} points, the smoke "
                             "case at 300 points, no fault suite (checks the script)")
    parser.add_argument("--repeats", type=int, default=None,
                        help=f"runs of each variant (default {REPEATS}, 1 with --quick)")
    parser.add_argument("--json", default=None,
                        help=f"results file (default {OUT}; none with --quick)")
    args = parser.parse_args(argv)
    repeats = args.repeats or (1 if args.quick else REPEATS)
    unit = measure_unit(repeats=1 if args.quick else 3)
    startup = worker_startup()
    trips = round_trips()
    with tempfile.TemporaryDirectory() as folder:
        demo_args = ["demo", *(["--n", str(QUICK_DEMO_N)] if args.quick else [])]
        demo = overhead("demo", demo_args, folder, repeats=repeats, smoke=False)
        case = _quick_smoke(folder) if args.quick else "cases/smoke.toml"
        smoke = overhead("smoke", ["run", case], folder, repeats=repeats, smoke=True)
    faults = None if args.quick else timed(
        [sys.executable, "-m", "pytest", "-q", "-p", "no:cacheprovider", "-n", "0",
         "tests/test_faults.py"])
    payload = {
        "benchmark": "isolation_overhead", "commit": commit(), "machine": machine(),
        "command": "python benchmarks/isolation_overhead.py "
                   + " ".join(argv if argv is not None else sys.argv[1:]),
        "unit": unit, "quick": bool(args.quick), "repeats": repeats, "limit": LIMIT,
        "worker_startup_seconds": {"median": median(startup), "samples": startup},
        "warm_round_trip_seconds": {"median": median(trips), "samples": trips},
        "demo": demo, "smoke": smoke, "fault_suite": faults,
        "in_units": {"worker_startup": median(startup) / unit["seconds"],
                     "warm_round_trip": median(trips) / unit["seconds"],
                     "demo_isolated": demo["isolated_seconds"] / unit["seconds"],
                     "demo_in_process": demo["in_process_seconds"] / unit["seconds"],
                     "smoke_isolated": smoke["isolated_seconds"] / unit["seconds"],
                     "smoke_in_process": smoke["in_process_seconds"] / unit["seconds"]},
        "load_average_after": list(os.getloadavg()),
    }
    out = args.json or (None if args.quick else OUT)
    if out:
        write_results(out, payload)
    print(f"unit {unit['seconds']:.3f} s; worker start-up {median(startup):.2f} s; warm "
          f"round trip {median(trips) * 1e3:.1f} ms")
    failed = False
    for name, record in (("demo", demo), ("smoke", smoke)):
        over = record["overhead"] >= LIMIT
        failed |= over
        print(f"{name}: isolated {record['isolated_seconds']:.1f} s, in process "
              f"{record['in_process_seconds']:.1f} s, overhead "
              f"{100 * record['overhead']:+.1f}% ({'at or over' if over else 'under'} the "
              f"{100 * LIMIT:.0f}% limit)")
    if faults is not None:
        print(f"fault suite {faults['seconds']:.1f} s ({faults['last_line']})")
    if out:
        print(f"-> {out}")
    return 1 if failed else 0


if __name__ == "__main__":
    sys.exit(main())
