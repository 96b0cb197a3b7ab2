"""The exact-operator reference against the dense reference at n = 20,000, 20 seeds.

Done-when check of issue 10: for 20 seeds of data (white-noise values) and probes,
|L_operator - L_dense| <= max(2 SE, 1e-3 nat), at least 18 of 20 within 2 SE, and the
quadratic form within its bound (plus 1e-11 relative for the dense reference's own
rounding, common practice). Points: 2D uniform (seed 0); Matern 3/2, s2 = 1, l = 0.1,
nugget 1e-2; preconditioner: the built-in HODLR solver at ``--tol`` (default 1e-8).
The dense values come from one certified Cholesky factor (``DenseCholesky``).

Usage::

    python benchmarks/operator_vs_dense.py [--n 20000] [--seeds 20] [--tol 1e-8]

Writes benchmarks/results/operator_vs_dense.json.
"""

from __future__ import annotations

import argparse
import math
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))
from operator_common import cholesky_unit, machine, write_results  # noqa: E402

from harness.model.kernels import Matern32  # noqa: E402
from harness.references import DenseCholesky  # noqa: E402
from harness.references.operator import operator_evaluate  # noqa: E402
from harness.solvers.registry import resolve_solver  # noqa: E402


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--n", type=int, default=20000)
    parser.add_argument("--seeds", type=int, default=20)
    parser.add_argument("--tol", type=float, default=1e-8)
    parser.add_argument("--unit-repeats", type=int, default=3)
    parser.add_argument("--name", default="operator_vs_dense")
    args = parser.parse_args(argv)
    kernel = Matern32(variance=1.0, lengthscale=0.1, nugget=1e-2)
    points = np.random.default_rng(0).random((args.n, 2))
    unit = cholesky_unit(args.unit_repeats)
    print(f"unit: dense Cholesky n=8192 {unit['median_seconds']:.2f} s", flush=True)
    start = time.perf_counter()
    dense = DenseCholesky(points, kernel)
    dense_s = time.perf_counter() - start
    logdet = dense.logdet()
    print(f"dense n={args.n}: {dense_s:.1f} s, certificate {dense.certificate:.3g}", flush=True)
    start = time.perf_counter()
    pre = resolve_solver("hodlr").factorize(points, kernel, tol=args.tol, rng=0)
    pre_s = time.perf_counter() - start
    print(f"preconditioner hodlr tol {args.tol:g}: {pre_s:.1f} s", flush=True)
    rows = []
    for seed in range(args.seeds):
        y = np.random.default_rng(1000 + seed).standard_normal(args.n)
        u = dense.solve_sqrt(y)
        quadratic = float(u @ u)
        loglik = -0.5 * (quadratic + logdet + args.n * math.log(2 * math.pi))
        ev = operator_evaluate(points, y, kernel, preconditioner=pre, rng=seed, score=False)
        dl = ev.loglik - loglik
        row = {"seed": seed, "dense_loglik": loglik, "operator_loglik": ev.loglik,
               "dL": dl, "loglik_se": ev.loglik_se,
               "within_2se": bool(abs(dl) <= 2 * ev.loglik_se),
               "within_limit": bool(abs(dl) <= max(2 * ev.loglik_se, 1e-3)),
               "dQ": ev.quadratic - quadratic, "quadratic_bound": ev.quadratic_bound,
               "quadratic_within_bound": bool(abs(ev.quadratic - quadratic)
                                              <= ev.quadratic_bound + 1e-11 * quadratic),
               "probes": ev.probes, "iterations": ev.iterations, "products": ev.products,
               "seconds": ev.seconds, "converged": ev.converged}
        rows.append(row)
        print(f"seed {seed:2d}: dL {dl:+.2e} SE {ev.loglik_se:.2e} dQ {row['dQ']:+.2e} "
              f"bound {ev.quadratic_bound:.1e} {ev.seconds:.1f} s", flush=True)
    summary = {
        "all_within_limit": all(r["within_limit"] for r in rows),
        "count_within_2se": sum(r["within_2se"] for r in rows),
        "all_quadratic_within_bound": all(r["quadratic_within_bound"] for r in rows),
        "all_converged": all(r["converged"] for r in rows),
        "max_abs_dL": max(abs(r["dL"]) for r in rows),
        "median_operator_seconds": float(np.median([r["seconds"] for r in rows])),
    }
    summary["passed"] = bool(summary["all_within_limit"] and summary["count_within_2se"] >= 18
                             and summary["all_quadratic_within_bound"])
    payload = {
        "problem": {"n": args.n, "d": 2, "points": "uniform on the unit square, seed 0",
                    "values": "white noise, seeds 1000..", "kernel": kernel.describe(),
                    "preconditioner": f"hodlr tol {args.tol:g}"},
        "unit": unit, "machine": machine(),
        "dense": {"seconds": dense_s, "units": dense_s / unit["median_seconds"],
                  "certificate": dense.certificate, "logdet": logdet},
        "preconditioner_seconds": pre_s, "seeds": rows, "summary": summary,
    }
    path = write_results(args.name, payload)
    print(f"{summary}\nwrote {path}")
    return 0 if summary["passed"] else 1


if __name__ == "__main__":
    raise SystemExit(main())
