"""Benchmark: the exact operator's score SE with the preconditioner's traces exact or probed.

The exact operator's score traces are tr(P^-1 P_i) of its preconditioner P plus a probed
difference (``harness.references.operator.score_traces``). The Vecchia factor offers its
traces exactly (``VecchiaFactorization.derivative_traces``); any other preconditioner's
are probed with 64 probes. This script evaluates the exact operator on the same data
with:

- ``vecchia exact``: the Vecchia factor at ``--neighbours`` as preconditioner, its
  traces exact (what ``check --preconditioner vecchia`` does);
- ``vecchia probed``: the same factor with its ``derivative_traces`` hidden, so that
  its traces are probed (what the operator did before);
- ``hodlr``: HODLR at tol 1e-10, the default preconditioner (traces probed).

It records each score's SE per parameter, the seconds of the evaluation and the
preconditioner's traces phase, and the ratio of the probed SE to the exact one. The data
are the scattered 2D points of ``check_at_scale.py`` (uniform on [0, 1000]^2, a Matern
3/2 field of length scale 50 by random Fourier features, 0.1 noise), evaluated at
variance 1, length scale 50 and nugget 0.01 with a constant mean, at each ``--sizes``
(the density grows with n, as in the check at scale).

Run::

    python benchmarks/operator_exact_traces.py --sizes 4096,16384 \
        --json benchmarks/results/operator_exact_traces.json
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))
sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests"))
from check_at_scale import synthetic_field  # noqa: E402
from machine_unit import machine, measure_unit, write_run  # noqa: E402
from probed_traces import ProbedTraces  # noqa: E402

from harness.model.kernels import Matern32  # noqa: E402
from harness.references.operator import operator_evaluate  # noqa: E402
from harness.solvers.hodlr.solver import factorize as hodlr  # noqa: E402
from harness.solvers.vecchia import factorize as vecchia  # noqa: E402

KERNEL = Matern32(1.0, 50.0, 0.01)


def evaluate(points: np.ndarray, y: np.ndarray, preconditioner: object) -> dict:
    start = time.perf_counter()
    ev = operator_evaluate(points, y, KERNEL, mean="constant", preconditioner=preconditioner,
                           rng=1, progress=False)
    return {"score_se": [float(v) for v in ev.score_se], "score": [float(v) for v in ev.score],
            "probes": ev.probes, "preconditioner_traces": ev.preconditioner_traces,
            "traces_seconds": ev.phases.get("preconditioner_traces"),
            "seconds": time.perf_counter() - start, "converged": ev.converged}


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--sizes", default="4096,16384")
    parser.add_argument("--neighbours", type=int, default=30)
    parser.add_argument("--unit-repeats", type=int, default=3)
    parser.add_argument("--json", default="benchmarks/results/operator_exact_traces.json")
    args = parser.parse_args(argv)
    info = machine()
    unit = measure_unit(args.unit_repeats)
    rows = []
    for n in (int(v) for v in args.sizes.split(",")):
        points, values = synthetic_field(n, 2, 50.0, np.random.default_rng(7))
        start = time.perf_counter()
        factor = vecchia(points, KERNEL, neighbours=args.neighbours)
        vecchia_seconds = time.perf_counter() - start
        start = time.perf_counter()
        tight = hodlr(points, KERNEL, tol=1e-10, rng=0)
        hodlr_seconds = time.perf_counter() - start
        runs = {"vecchia exact": evaluate(points, values, factor),
                "vecchia probed": evaluate(points, values, ProbedTraces(factor)),
                "hodlr": evaluate(points, values, tight)}
        ratio = (np.asarray(runs["vecchia probed"]["score_se"])
                 / np.asarray(runs["vecchia exact"]["score_se"]))
        rows.append({"n": n, "neighbours": args.neighbours,
                     "vecchia_factor_seconds": vecchia_seconds,
                     "hodlr_factor_seconds": hodlr_seconds, "runs": runs,
                     "probed_over_exact_se": [float(v) for v in ratio]})
        print(f"n = {n:,}: SE probed / exact {np.round(ratio, 2).tolist()}; "
              f"hodlr SE {np.round(runs['hodlr']['score_se'], 3).tolist()}, vecchia exact "
              f"{np.round(runs['vecchia exact']['score_se'], 3).tolist()}", flush=True)
    write_run(args.json, "operator_exact_traces", argv, info, unit=unit,
              problem={"kernel": KERNEL.describe(), "mean": "constant",
                       "data": "check_at_scale.py plane data (seed 7) at each n",
                       "probes": "the operator's defaults (16 to 256, SE target 0.02 nat; "
                                 "64 probes of a probed preconditioner's traces)"},
              results=rows)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
