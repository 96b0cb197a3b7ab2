"""What one solver child costs with and without the fork server's kernel preload.

``check`` runs every call into the solver under test in a child forked from the fork
server (``harness.infra.child_process``); ``harness.check.plugin_guard.prepare_solver_children``
starts that server with the built-in solvers' compiled kernels loaded from numba's cache
(``harness.solvers.compiled_preload``). Here, per built-in solver, one fit evaluation of
``harness.check.solver_timing.time_fit_evaluations`` (one untimed and one timed call) at
``N`` points is run:

- in process, after one warm-up call (median of ``REPEATS``);
- in a child, each from a fresh fork of a server started without the preload ("cold"),
  and from one started with it ("preloaded"), median of ``REPEATS`` after the server's
  first child.

Each mode runs in its own interpreter, since a fork server is one per process. The
per-child overhead is the child's wall time minus the in-process median.

Run from the repository root: ``python benchmarks/child_kernel_preload.py [--json PATH]``.
"""

from __future__ import annotations

import argparse
import json
import statistics
import subprocess
import sys
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))

N = 300
REPEATS = 7
SOLVERS = {"hodlr": 1e-6, "vecchia": 30.0}


def _arguments(solver: str) -> tuple[tuple, dict]:
    import numpy as np

    from harness.model.kernels import make_kernel
    from harness.solvers.registry import resolve_solver

    rng = np.random.default_rng(0)
    points, y = rng.random((N, 2)), rng.standard_normal(N)
    kernel = make_kernel("matern32", {"variance": 1.0, "lengthscale": 0.2, "nugget": 1e-2})
    return (points, y, kernel), dict(mean="constant", solver=resolve_solver(solver),
                                     label=solver, values=[SOLVERS[solver]], options={},
                                     base_seed=0, repeats=1)


def measure(mode: str, solver: str) -> list[float]:
    """Seconds of ``REPEATS`` calls in ``mode`` (module docstring), in this process."""
    from harness.check.solver_timing import time_fit_evaluations
    from harness.infra.child_process import call_in_child, prepare_server

    args, kwargs = _arguments(solver)
    if mode == "in-process":
        def call() -> object:
            return time_fit_evaluations(*args, **kwargs)
    else:
        if mode == "preloaded":
            prepare_server(("harness.check.pipeline", "harness.solvers.compiled_preload"))
        else:
            prepare_server(("harness.check.pipeline",))

        def call() -> object:
            return call_in_child(time_fit_evaluations, *args, **kwargs)
    call()  # the server's start (or the in-process first call)
    times = []
    for _ in range(REPEATS):
        start = time.perf_counter()
        call()
        times.append(time.perf_counter() - start)
    return times


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--json", type=Path, default=None)
    parser.add_argument("--one", nargs=2, metavar=("MODE", "SOLVER"), help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.one:
        print(json.dumps(measure(*args.one)))
        return
    from machine_unit import commit, machine, measure_unit, write_results

    unit = measure_unit()
    results: dict[str, dict] = {}
    for solver in SOLVERS:
        row = {}
        for mode in ("in-process", "cold", "preloaded"):
            out = subprocess.run([sys.executable, __file__, "--one", mode, solver],
                                 capture_output=True, text=True, check=True).stdout
            samples = json.loads(out.strip().splitlines()[-1])
            row[mode] = {"median": statistics.median(samples), "samples": samples}
        base = row["in-process"]["median"]
        row["per_child_overhead_seconds"] = {m: row[m]["median"] - base
                                             for m in ("cold", "preloaded")}
        results[solver] = row
        print(f"{solver}: in process {base:.3f} s; per-child overhead cold "
              f"{row['per_child_overhead_seconds']['cold']:.3f} s, preloaded "
              f"{row['per_child_overhead_seconds']['preloaded']:.3f} s")
    if args.json:
        write_results(str(args.json), {"benchmark": "child_kernel_preload",
                                       "commit": commit(), "machine": machine(),
                                       "unit": unit, "n": N, "repeats": REPEATS,
                                       "solvers": results})


if __name__ == "__main__":
    main()
