"""Log-likelihood error of the HODLR solver against the dense reference, per tolerance.

Problem (issue 11's accuracy setting): n points uniform on the unit square, Matern 3/2,
s2 = 1, l = 0.1, nugget 1e-2, leaf size 128. Two data vectors: white noise (the hardest
case for the quadratic term) and a draw from the model (a smooth field plus noise).
For every tolerance, ``--seeds`` ACA seeds; the figure is the median over seeds of
|L_hodlr - L_dense|, L = -1/2 y'S^-1 y - 1/2 log det S - n/2 log 2 pi (Rasmussen and
Williams, *Gaussian Processes for Machine Learning*, 2006, eq. 2.30). The dense side is
the certified LAPACK Cholesky of ``harness.references`` (panel factorization above
n = 8,192). Also recorded: the relative 2-norm error of the compressed matrix,
||Sigma - Sigma~||_2 / ||Sigma||_2, estimated by 30 power iterations on the difference.

Usage::

    python benchmarks/hodlr_accuracy.py --n 16000 --seeds 5 --tol 1e-6 1e-8 1e-10 \
        --json benchmarks/results/hodlr_accuracy.json
"""

from __future__ import annotations

import argparse
import time

import numpy as np
from machine_unit import machine, write_run

from harness.geometry.pointsets import uniform
from harness.model.kernels import Matern32
from harness.references import DenseCholesky
from harness.solvers.hodlr import factorize


def loglik(quad: float, logdet: float, n: int) -> float:
    """Gaussian log-likelihood from y'S^-1 y and log det S (RW 2006, eq. 2.30)."""
    return -0.5 * quad - 0.5 * logdet - 0.5 * n * np.log(2.0 * np.pi)


def spectral_error(dense: DenseCholesky, f, n: int, rng: np.random.Generator) -> float:
    """||Sigma - Sigma~||_2 / ||Sigma||_2 by power iteration (30 steps, both norms)."""
    def power(op) -> float:
        v = rng.standard_normal(n)
        v /= np.linalg.norm(v)
        lam = 0.0
        for _ in range(30):
            w = op(v)
            lam = float(np.linalg.norm(w))
            v = w / lam
        return lam

    sigma = dense.matvec
    return power(lambda v: sigma(v) - f.matvec(v)) / power(sigma)


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--n", type=int, default=16000)
    parser.add_argument("--seeds", type=int, default=5)
    parser.add_argument("--tol", type=float, nargs="+", default=[1e-6, 1e-8, 1e-10])
    parser.add_argument("--json", default="benchmarks/results/hodlr_accuracy.json")
    args = parser.parse_args(argv)
    info = machine()
    kernel = Matern32(variance=1.0, lengthscale=0.1, nugget=1e-2)
    rng = np.random.default_rng(0)
    points = uniform(args.n, 2, rng=rng)
    start = time.perf_counter()
    dense = DenseCholesky(points, kernel)
    data = {"white noise": rng.standard_normal(args.n),
            "smooth field": dense.apply_sqrt(rng.standard_normal(args.n))}
    exact = {name: loglik(float(y @ dense.solve(y)), dense.logdet(), args.n)
             for name, y in data.items()}
    print(f"dense reference at n = {args.n}: {time.perf_counter() - start:.1f} s", flush=True)
    rows = []
    for tol in args.tol:
        errors: dict[str, list[float]] = {name: [] for name in data}
        spectral = []
        for seed in range(args.seeds):
            f = factorize(points, kernel, None, tol=tol, rng=seed)
            for name, y in data.items():
                errors[name].append(abs(loglik(float(y @ f.solve(y)), f.logdet(), args.n)
                                        - exact[name]))
            spectral.append(spectral_error(dense, f, args.n, np.random.default_rng(seed)))
        row = {"tol": tol, "abs_loglik_error": errors,
               "median_abs_loglik_error": {k: float(np.median(v)) for k, v in errors.items()},
               "relative_spectral_error": spectral,
               "median_relative_spectral_error": float(np.median(spectral))}
        rows.append(row)
        print(f"tol {tol:.0e}: median |dL| white noise "
              f"{row['median_abs_loglik_error']['white noise']:.3g}, smooth field "
              f"{row['median_abs_loglik_error']['smooth field']:.3g} nat; "
              f"||S - S~||_2 / ||S||_2 {row['median_relative_spectral_error']:.3g}",
              flush=True)
    write_run(args.json, "hodlr_accuracy", argv, info, n=args.n, seeds=args.seeds,
              exact_loglik=exact, rows=rows)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
