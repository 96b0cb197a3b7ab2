"""How good is ``covaudit cases``' cost estimate? Estimate a case, run it, compare.

Measures, in one process: the dense-rate probe that calibrates the estimate
(``harness.linalg.dense_rate.measure_dense_rate``), the same-run unit (one
``scipy.linalg.cho_factor`` at n = 8,192, default threads, median of ``--unit-repeats``),
the estimate of every task of CASEFILE, and the measured serial run of the grid
(``run_grid`` seconds, as ``covaudit run`` prints them; median of ``--repeats`` fresh
runs). Optionally times ``covaudit demo`` in a subprocess (wall seconds, imports
included). Writes a results JSON with the machine, threads and library versions.

Usage::

    python benchmarks/cost_model.py cases/smoke.toml --demo \
        --json benchmarks/results/cost_model.json
"""

from __future__ import annotations

import argparse
import json
import platform
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))
from operator_common import cholesky_unit, machine  # noqa: E402


def _run_case(casefile: str) -> float:
    from harness.grid.cases import load_case
    from harness.grid.runner import make_backend, run_grid
    from harness.grid.store import RunStore

    case = load_case(casefile)
    with tempfile.TemporaryDirectory() as tmp:
        store = RunStore(Path(tmp) / "run")
        store.prepare()
        backend = make_backend(workers=None, dask_local=None, scheduler=None)
        try:
            summary = run_grid(case.tasks(), store, backend, case_file=casefile,
                               case_text=Path(casefile).read_text(encoding="utf-8"),
                               case_info=case.to_dict())
        finally:
            backend.close()
    return float(summary.seconds)


def _demo_run() -> dict:
    """Wall seconds of ``covaudit demo`` (imports included), its exit code, and whether
    its fit converged (``demo.json``)."""
    with tempfile.TemporaryDirectory() as tmp:
        start = time.perf_counter()
        done = subprocess.run([sys.executable, "-c", "import sys; from harness.cli import "
                               "main; sys.exit(main())", "demo", "--out", tmp],
                              check=False, capture_output=True, text=True)
        seconds = time.perf_counter() - start
        report = Path(tmp) / "demo.json"
        fit = json.loads(report.read_text())["fit"] if report.exists() else {}
        return {"demo_wall_seconds": seconds, "demo_exit_code": done.returncode,
                "demo_fit_converged": fit.get("converged")}


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("casefile")
    parser.add_argument("--repeats", type=int, default=2, help="measured runs (median)")
    parser.add_argument("--unit-repeats", type=int, default=3)
    parser.add_argument("--demo", action="store_true", help="also time covaudit demo")
    parser.add_argument("--json", help="write the results to this file")
    args = parser.parse_args(argv)

    from harness._version import __version__
    from harness.grid.cases import load_case
    from harness.grid.cases.cost import contention, estimate_grid
    from harness.grid.store.environment import environment
    from harness.linalg.dense_rate import measure_dense_rate

    case = load_case(args.casefile)
    rate = measure_dense_rate(rng=0)
    load_before = list(__import__("os").getloadavg())
    estimate = estimate_grid(case.tasks(), dense_limit_bytes=None, rate=rate,
                             load_factor=contention())
    runs = [_run_case(args.casefile) for _ in range(args.repeats)]
    measured = float(np.median(runs))
    unit = cholesky_unit(args.unit_repeats)
    ratio = estimate.total_seconds / measured
    out = {
        "what": "covaudit cases estimate against a measured serial run of the same grid",
        "command": "python benchmarks/cost_model.py " + " ".join(argv or sys.argv[1:]),
        "case": args.casefile, "tasks": len(estimate.tasks),
        "probe": rate.to_dict(), "estimate": estimate.to_dict(),
        "measured_run_seconds": runs, "measured_median_seconds": measured,
        "estimate_over_measured": ratio,
        "unit": unit, "measured_in_units": measured / unit["median_seconds"],
        "machine": {"cpu": platform.processor() or platform.machine(),
                    "environment": environment(None)},
        "threadpools": machine()["thread_pools"],
        "covaudit": __version__, "numpy": np.__version__,
        "load_average_at_start": load_before,
        "load_average_at_end": list(__import__("os").getloadavg()),
    }
    if args.demo:
        out.update(_demo_run())
    print(f"estimate {estimate.total_seconds:.1f} s (start-up {estimate.startup_seconds:.1f} "
          f"s, probe {rate.flops / 1e9:.2f} Gflop/s, load x{estimate.contention:.2f}), "
          f"measured {measured:.1f} s "
          f"(runs {', '.join(f'{r:.1f}' for r in runs)}); estimate/measured {ratio:.2f}; "
          f"unit (dpotrf n=8192) {unit['median_seconds']:.2f} s"
          + (f"; demo {out['demo_wall_seconds']:.0f} s" if args.demo else ""))
    if args.json:
        Path(args.json).parent.mkdir(parents=True, exist_ok=True)
        Path(args.json).write_text(json.dumps(out, indent=1, default=str) + "\n",
                                   encoding="utf-8")
        print(f"wrote {args.json}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
