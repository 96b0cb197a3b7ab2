"""The default test run's wall time on a fresh checkout, as CI runs it.

Clones HEAD into a temporary folder (``git clone``: no numba cache, no ``__pycache__``,
as on a CI machine), and runs the README's test command there,

    python -m pytest -q -p no:cacheprovider

with the clone first on ``PYTHONPATH``, so that the clone's sources (and their empty
compile cache) are the ones imported; the interpreter and the installed dependencies are
this environment's (installing them is not timed). Records the wall seconds of the whole
command (pytest's start-up and the kernel warm-up of ``tests/conftest.py`` included),
pytest's summary line, its exit code, and the same-run unit (one dpotrf at n = 8,192,
``machine_unit``) measured before the run. Issue 21 asks for under 10 minutes on 2
cores; the script exits 1 when the run fails or takes ``--limit`` seconds (600) or more.

Run: ``python benchmarks/suite_time.py --json benchmarks/results/suite_time.json``
(about 10 minutes; nothing else should run on the machine meanwhile).
"""

from __future__ import annotations

import argparse
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

from machine_unit import machine, measure_unit, write_run

ROOT = Path(__file__).resolve().parents[1]
COMMAND = ["-m", "pytest", "-q", "-p", "no:cacheprovider"]


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__,
                                     formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--json", help="results file (default: print only)")
    parser.add_argument("--limit", type=float, default=600.0)
    parser.add_argument("--unit-repeats", type=int, default=3)
    args = parser.parse_args(argv)
    info = machine()
    unit = measure_unit(args.unit_repeats)
    print(f"unit: {unit['seconds']:.2f} s", flush=True)
    with tempfile.TemporaryDirectory(prefix="covaudit-suite-") as scratch:
        clone = Path(scratch) / "clone"
        subprocess.run(["git", "clone", "-q", str(ROOT), str(clone)], check=True)
        head = subprocess.run(["git", "rev-parse", "HEAD"], cwd=clone, check=True,
                              capture_output=True, text=True).stdout.strip()
        env = {**os.environ, "PYTHONPATH": str(clone)}
        env.pop("NUMBA_CACHE_DIR", None)  # the in-tree cache of the clone: empty
        start = time.perf_counter()
        done = subprocess.run([sys.executable, *COMMAND], cwd=clone, env=env,
                              capture_output=True, text=True)
        seconds = time.perf_counter() - start
    lines = done.stdout.strip().splitlines()
    summary = next((line for line in reversed(lines) if " in " in line and
                    ("passed" in line or "failed" in line)), lines[-1] if lines else "")
    passed = done.returncode == 0 and seconds < args.limit
    result = {"command": "python " + " ".join(COMMAND), "clone_of": head,
              "exit_code": done.returncode, "seconds": seconds,
              "units": seconds / unit["seconds"], "limit_seconds": args.limit,
              "pytest_summary": summary, "passed": passed}
    print(f"{seconds:.1f} s ({result['units']:.1f} units): {summary}")
    if done.returncode != 0:
        print(done.stdout[-4000:], file=sys.stderr)
    if args.json:
        write_run(args.json, "suite_time", argv, info, unit=unit, result=result)
    return 0 if passed else 1


if __name__ == "__main__":
    sys.exit(main())
