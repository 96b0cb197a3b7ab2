"""What one guarded child process costs to start: forked from the fork server against spawned.

``harness.infra.child_process.call_in_child`` runs every dense stage of ``check`` and every
call into a plugin solver in a child process. This script times the whole round trip of
one such call whose work is nothing (building a default ``CheckOptions``, so the child
needs ``harness.check`` and everything it imports, as a real stage does), in one run,
beside the same-run unit of ``machine_unit`` (one dpotrf at n = 8,192):

- ``fork_server``: the child forked from multiprocessing's fork server (the default). The
  first call also starts the server and is reported apart (``first_call_seconds``);
- ``spawn``: the child started by ``spawn``, as every child was before the fork server.
  It is forced through the guard's own rule: a load-time variable (``NUMBA_*``) that the
  server was not started with.

Medians of ``--repeats`` calls each. Run from the repository root:
``python benchmarks/child_startup.py --json benchmarks/results/child_startup.json``.
"""

from __future__ import annotations

import argparse
import os
import statistics
import sys
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))

from machine_unit import commit, machine, measure_unit, write_results  # noqa: E402

#: A variable of the ``NUMBA_`` family numba does not read: setting it only makes the
#: guard see a load-time environment unlike the server's, so it spawns.
FORCE_SPAWN_VARIABLE = "NUMBA_COVAUDIT_BENCHMARK_SPAWN"


def round_trips(repeats: int) -> list[float]:
    """Seconds of ``repeats`` guarded calls of a stage that does nothing."""
    from harness.check.check_options import CheckOptions
    from harness.infra.child_process import call_in_child

    times = []
    for _ in range(repeats):
        start = time.perf_counter()
        call_in_child(CheckOptions, what="an empty stage")
        times.append(time.perf_counter() - start)
    return times


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__,
                                     formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--json", default="benchmarks/results/child_startup.json")
    parser.add_argument("--repeats", type=int, default=7)
    parser.add_argument("--unit-repeats", type=int, default=3)
    args = parser.parse_args(argv)
    unit = measure_unit(args.unit_repeats)
    first, *forked = round_trips(args.repeats + 1)
    os.environ[FORCE_SPAWN_VARIABLE] = "1"
    try:
        spawned = round_trips(args.repeats)
    finally:
        del os.environ[FORCE_SPAWN_VARIABLE]
    fork_median, spawn_median = statistics.median(forked), statistics.median(spawned)
    payload = {
        "benchmark": "child_startup", "commit": commit(), "machine": machine(),
        "command": "python benchmarks/child_startup.py " + " ".join(argv or sys.argv[1:]),
        "unit": unit, "repeats": args.repeats,
        "fork_server": {"median_seconds": fork_median, "samples": forked,
                        "first_call_seconds": first},
        "spawn": {"median_seconds": spawn_median, "samples": spawned},
        "spawn_over_fork_server": spawn_median / fork_median,
        "load_average_after": list(os.getloadavg()),
    }
    write_results(args.json, payload)
    print(f"unit {unit['seconds']:.2f} s; fork server {fork_median:.3f} s (first call "
          f"{first:.2f} s); spawn {spawn_median:.3f} s; ratio {spawn_median / fork_median:.1f}"
          f" -> {args.json}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
