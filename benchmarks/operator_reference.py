"""Exact-operator reference at n = 131,072: one product, and optionally a log-likelihood.

Problem: 2D uniform points, Matern 3/2, s2 = 1, l = 0.1, nugget 1e-2 (the issue's
setting). Figures (seconds and ratios to the same-run dense-Cholesky unit, see
``operator_common``):

* ``product``: one exact product Sigma B with k = 32 columns (target <= 45 s on this
  machine unloaded), after compiling at a small n;
* ``loglik`` (``--loglik``): ``operator_evaluate`` with SE target 0.02 nat, preconditioned
  by the built-in HODLR solver at tol 1e-8 (target <= 10 min including the preconditioner).

Usage::

    python benchmarks/operator_reference.py [--n 131072] [--k 32] [--loglik]

Writes benchmarks/results/operator_reference.json.
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))
from operator_common import cholesky_unit, machine, write_results  # noqa: E402

from harness.model.kernels import Matern32  # noqa: E402
from harness.references.operator import KernelOperator, operator_evaluate  # noqa: E402
from harness.solvers.registry import resolve_solver  # noqa: E402


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--n", type=int, default=131072)
    parser.add_argument("--k", type=int, default=32)
    parser.add_argument("--loglik", action="store_true", help="also the log-likelihood")
    parser.add_argument("--unit-repeats", type=int, default=3)
    parser.add_argument("--name", default="operator_reference")
    args = parser.parse_args(argv)
    kernel = Matern32(variance=1.0, lengthscale=0.1, nugget=1e-2)
    rng = np.random.default_rng(0)
    points = rng.random((args.n, 2))
    unit = cholesky_unit(args.unit_repeats)
    print(f"unit: dense Cholesky n=8192 {unit['median_seconds']:.2f} s (median)", flush=True)
    KernelOperator(points[:2048], kernel, progress=False).matvec(np.ones((2048, 2)))
    block = rng.standard_normal((args.n, args.k))
    op = KernelOperator(points, kernel)
    start = time.perf_counter()
    op.matvec(block)
    product_s = time.perf_counter() - start
    print(f"product n={args.n} k={args.k}: {product_s:.1f} s "
          f"({product_s / unit['median_seconds']:.2f} units)", flush=True)
    out: dict[str, object] = {
        "problem": {"n": args.n, "d": 2, "points": "uniform on the unit square, seed 0",
                    "kernel": kernel.describe()},
        "unit": unit, "machine": machine(),
        "product": {"k": args.k, "seconds": product_s,
                    "units": product_s / unit["median_seconds"], "target_seconds": 45.0,
                    "tile": op.tile},
    }
    if args.loglik:
        y = np.random.default_rng(1).standard_normal(args.n)
        start = time.perf_counter()
        pre = resolve_solver("hodlr").factorize(points, kernel, tol=1e-8, rng=0)
        pre_s = time.perf_counter() - start
        print(f"preconditioner (hodlr tol 1e-8): {pre_s:.1f} s", flush=True)
        ev = operator_evaluate(points, y, kernel, preconditioner=pre, rng=2, se_target=0.02,
                               score=False)
        total = time.perf_counter() - start
        out["loglik"] = {
            "seconds_total": total, "seconds_preconditioner": pre_s,
            "seconds_operator": ev.seconds, "units_total": total / unit["median_seconds"],
            "target_seconds": 600.0, "evaluation": ev.to_dict()}
        print(f"loglik {ev.loglik:.6f} SE {ev.loglik_se:.3g} converged {ev.converged}; "
              f"{total:.1f} s total ({ev.iterations} iterations, {ev.products} products)")
    path = write_results(args.name, out)
    print(f"wrote {path}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
