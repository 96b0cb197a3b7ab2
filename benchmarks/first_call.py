"""The first call on a cleared compile cache against the same call warm.

Two calls, each timed in fresh processes (wall seconds from the interpreter's start to
its exit, imports included):

- ``hodlr``: a HODLR factorization and log-likelihood (value only) of 2D uniform points
  (a script, not the CLI: no compile notice),
  Matern 3/2, s2 = 1, l = 0.1, nugget 1e-2, tol 1e-6, at ``--n`` (default 131,072);
- ``check``: ``covaudit check`` on the demo data (``harness.check.demo_data``) at
  ``--check-n`` points (default 2,000) at fixed parameters (the demo's true variance and
  nugget, one length scale of 200 m), hodlr at 1e-4 and 1e-6.

For each repeat, ``NUMBA_CACHE_DIR`` is a new empty folder (a cleared cache, as on a fresh
install): the first process compiles what the call needs ("cold"), the second loads it
("warm"). Medians over ``--repeats``; the overhead is cold - warm. The unit is one dpotrf
at n = 8,192 measured in the same run (``machine_unit``). Exits 1 when an overhead exceeds
``--limit`` seconds (default 10).

Usage::

    python benchmarks/first_call.py \
        --json benchmarks/results/first_call.json
"""

from __future__ import annotations

import argparse
import os
import subprocess
import sys
import tempfile
import time
from collections.abc import Callable
from pathlib import Path

from machine_unit import machine, measure_unit, median, write_run

_HODLR = r"""
import sys
import numpy as np
from harness.likelihood import evaluate_likelihood
from harness.model.kernels import Matern32
from harness.solvers.registry import resolve_solver
n = int(sys.argv[1])
kernel = Matern32(variance=1.0, lengthscale=0.1, nugget=1e-2)
rng = np.random.default_rng(0)
points, y = rng.random((n, 2)), rng.standard_normal(n)
factor = resolve_solver("hodlr").factorize(points, kernel, tol=1e-6)
print(evaluate_likelihood(factor, points, y, kernel, score=False).loglik)
"""


def _demo_csv(folder: Path, n: int) -> Path:
    from harness.check.demo_data import generate_demo

    path = folder / "demo.csv"
    generate_demo(n=n).frame.to_csv(path, index=False)
    return path


def _check_command(csv: Path, out: Path) -> list[str]:
    return [sys.executable, "-m", "harness", "check", str(csv),
            "--coords", "easting_m,northing_m", "--value", "vwc", "--kernel", "matern32",
            "--fixed-params", "variance=0.0036", "lengthscale=200", "nugget=0.0004",
            "--tolerances", "1e-4,1e-6", "--out", str(out)]


def _timed(command: list[str], cache: Path) -> dict:
    """Wall seconds of ``command`` with ``cache`` as numba's cache folder."""
    env = {**os.environ, "NUMBA_CACHE_DIR": str(cache)}
    start = time.perf_counter()
    proc = subprocess.run(command, env=env, capture_output=True, text=True, check=False)
    seconds = time.perf_counter() - start
    return {"seconds": seconds, "exit_code": proc.returncode,
            "compile_notice": "compiling kernels (once)" in proc.stderr,
            "stderr_tail": proc.stderr.strip().splitlines()[-3:]}


def _pair(command: Callable[[Path], list[str]], repeats: int) -> dict:
    """Cold and warm runs of ``command(folder)``, each with a new output folder (a check
    resumes from the state folder of an earlier run with the same ``--out``)."""
    cold, warm = [], []
    for _ in range(repeats):
        with tempfile.TemporaryDirectory(prefix="covaudit-numba-") as work:
            cache = Path(work) / "numba-cache"
            cold.append(_timed(command(Path(work) / "cold"), cache))
            warm.append(_timed(command(Path(work) / "warm"), cache))
    cold_s = median([r["seconds"] for r in cold])
    warm_s = median([r["seconds"] for r in warm])
    return {"cold": cold, "warm": warm, "cold_seconds": cold_s, "warm_seconds": warm_s,
            "overhead_seconds": cold_s - warm_s, "ratio": cold_s / warm_s}


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--n", type=int, default=131_072)
    parser.add_argument("--check-n", type=int, default=2000)
    parser.add_argument("--repeats", type=int, default=3)
    parser.add_argument("--limit", type=float, default=10.0)
    parser.add_argument("--json", default=None)
    args = parser.parse_args(argv)
    info = machine()
    unit = measure_unit()
    calls = {}
    with tempfile.TemporaryDirectory(prefix="covaudit-first-call-") as work:
        folder = Path(work)
        calls["hodlr"] = {"n": args.n, **_pair(
            lambda _: [sys.executable, "-c", _HODLR, str(args.n)], args.repeats)}
        csv = _demo_csv(folder, args.check_n)
        calls["check"] = {"n": args.check_n, **_pair(
            lambda out: _check_command(csv, out), args.repeats)}
    failed = []
    for name, call in calls.items():
        print(f"{name} (n = {call['n']:,}): cold {call['cold_seconds']:.1f} s, warm "
              f"{call['warm_seconds']:.1f} s, overhead {call['overhead_seconds']:.1f} s "
              f"(x{call['ratio']:.2f}; {call['overhead_seconds'] / unit['seconds']:.1f} units)")
        if call["overhead_seconds"] > args.limit:
            failed.append(name)
    if args.json:
        write_run(args.json, "first_call", argv, info, unit=unit, limit_seconds=args.limit,
                  repeats=args.repeats, calls=calls, within_limit=not failed)
    if failed:
        print(f"first call more than {args.limit:g} s slower than warm: {', '.join(failed)}")
        return 1
    return 0


if __name__ == "__main__":
    sys.exit(main())
