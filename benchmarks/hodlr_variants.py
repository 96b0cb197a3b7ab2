"""The HODLR design choices against their alternatives: accuracy, and the speed of parts.

Every alternative is the shipped solver with one setting changed in this process only
(module constants read at call time, or one function replaced), so the comparison is
same-run and same-data. Problem: issue 11's accuracy setting (``hodlr_accuracy.py``):
n points uniform on the unit square, Matern 3/2, s2 = 1, l = 0.1, nugget 1e-2, white-noise
values and a draw from the model; median over ``--seeds`` ACA seeds of |L_hodlr - L_dense|
(Rasmussen and Williams 2006, eq. 2.30), with the factorization's median wall time.

Variants:

* ``shipped``: ACA to tol / 2, truncation to tol / 20, 8 x 8 residual check rows;
* ``aca_quarter``: ACA to tol / 4;
* ``top_levels_loose``: truncation to tol / 2 on blocks of n / 8 rows or more (the top
  two levels), tol / 20 below;
* ``check_rows_32``: 32 residual check rows per round;
* ``strict_orthogonality``: the factor's implicit Q held to a loss of orthogonality of
  tol / 100 instead of tol (forms Q explicitly at most nodes for tol <= 1e-8).

Parts (medians of ``--repeats``, one BLAS thread as inside the solver): ``orth.thin_qr``
(shifted CholeskyQR3 at this condition) against ``numpy.linalg.qr`` on a 32,768 x 720
matrix of condition 1e8; the scaled Gram factor of a 32,768 x 252 block, Gram first
(shipped) against columns scaled first; HODLR solve and matvec of 64 columns at
``--operator-n`` with one and two worker threads.

Usage::

    python benchmarks/hodlr_variants.py --json benchmarks/results/hodlr_variants.json
"""

from __future__ import annotations

import argparse
import time

import numpy as np
from machine_unit import machine, measure_unit, median, write_run
from threadpoolctl import threadpool_limits

import harness.solvers.hodlr.compressed as compressed
import harness.solvers.hodlr.entries as entries
import harness.solvers.hodlr.factor as factor
from harness.geometry.pointsets import uniform
from harness.model.kernels import Matern32
from harness.references import DenseCholesky
from harness.solvers.hodlr import factorize
from harness.solvers.hodlr.aca import recompress
from harness.solvers.hodlr.orth import rcond_for, scaled_gram_factor, thin_qr

KERNEL = Matern32(variance=1.0, lengthscale=0.1, nugget=1e-2)


def loglik(quad: float, logdet: float, n: int) -> float:
    """Gaussian log-likelihood from y'S^-1 y and log det S (RW 2006, eq. 2.30)."""
    return -0.5 * quad - 0.5 * logdet - 0.5 * n * np.log(2.0 * np.pi)


def _top_levels_loose(n: int):
    """``entries.recompress`` with ten times its tolerance (tol / 20 -> tol / 2) on
    blocks of n / 8 rows or more; A is k x m, so its second dimension is the rows."""
    def loose(a, b, *, tol, **grams):
        return recompress(a, b, tol=10.0 * tol if a.shape[1] >= n // 8 else tol, **grams)

    return entries, "recompress", loose


def variants(n: int) -> dict[str, list[tuple[object, str, object]]]:
    """Name -> (owner, attribute, value) replacements applied while the variant runs."""
    return {
        "shipped": [],
        "aca_quarter": [(entries, "ACA_SHARE", 0.25)],
        "top_levels_loose": [_top_levels_loose(n)],
        "check_rows_32": [(compressed, "CHECK_ROWS", 32)],
        "strict_orthogonality": [(factor, "implicit_rcond", lambda tol: rcond_for(
            orthogonality=0.01 * tol, rounding=0.01 * tol))],
    }


def run_variant(changes, points, data, exact, tols, seeds) -> list[dict]:
    saved = [(owner, name, getattr(owner, name)) for owner, name, _ in changes]
    for owner, name, value in changes:
        setattr(owner, name, value)
    try:
        rows = []
        for tol in tols:
            errors: dict[str, list[float]] = {k: [] for k in data}
            walls, factor_walls = [], []
            for seed in range(seeds):
                t = time.perf_counter()
                f = factorize(points, KERNEL, None, tol=tol, rng=seed)
                walls.append(time.perf_counter() - t)
                factor_walls.append(f.timings.factor)
                for name, y in data.items():
                    errors[name].append(abs(loglik(float(y @ f.solve(y)), f.logdet(),
                                                   points.shape[0]) - exact[name]))
            rows.append({"tol": tol, "abs_loglik_error": errors,
                         "median_abs_loglik_error": {k: median(v) for k, v in errors.items()},
                         "median_seconds": median(walls),
                         "median_factor_seconds": median(factor_walls),
                         "level_max_ranks": [r.max for r in f.ranks]})
        return rows
    finally:
        for owner, name, value in saved:
            setattr(owner, name, value)


def _timed(call, repeats: int) -> float:
    call()
    times = []
    for _ in range(repeats):
        t = time.perf_counter()
        call()
        times.append(time.perf_counter() - t)
    return median(times)


def parts(repeats: int, operator_n: int) -> dict:
    rng = np.random.default_rng(0)
    out: dict = {}
    with threadpool_limits(limits=1, user_api="blas"):
        u, _ = np.linalg.qr(rng.standard_normal((32768, 720)))
        v, _ = np.linalg.qr(rng.standard_normal((720, 720)))
        x = np.asfortranarray((u * np.logspace(0, -8, 720)) @ v.T)
        del u
        out["qr_32768x720_cond1e8"] = {
            "thin_qr_seconds": _timed(lambda: thin_qr(x), repeats),
            "householder_seconds": _timed(lambda: np.linalg.qr(x), repeats)}
        big = rng.standard_normal((32768, 1400))
        block = big[:, 445:445 + 252]

        def columns_first():
            d = np.sqrt(np.einsum("ij,ij->j", block, block))
            xs = block / d
            return xs.T @ xs

        out["gram_32768x252"] = {
            "gram_first_seconds": _timed(lambda: scaled_gram_factor(block), repeats),
            "columns_first_seconds": _timed(columns_first, repeats)}
    points = np.random.default_rng(0).random((operator_n, 2))
    b = np.random.default_rng(1).standard_normal((operator_n, 64))
    ops: dict = {}
    for threads in (1, 2):
        f = factorize(points, KERNEL, None, tol=1e-6, rng=0, threads=threads)
        ops[str(threads)] = {name: _timed(lambda op=op: op(b), repeats)
                             for name, op in (("solve", f.solve), ("matvec", f.matvec),
                                              ("solve_sqrt", f.solve_sqrt))}
    out[f"operators_{operator_n}_64_columns"] = ops
    return out


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--n", type=int, default=16000)
    parser.add_argument("--seeds", type=int, default=5)
    parser.add_argument("--tol", type=float, nargs="+", default=[1e-6, 1e-8, 1e-10])
    parser.add_argument("--repeats", type=int, default=3)
    parser.add_argument("--operator-n", type=int, default=65536)
    parser.add_argument("--json", default="benchmarks/results/hodlr_variants.json")
    args = parser.parse_args(argv)
    info = machine()
    unit = measure_unit()
    rng = np.random.default_rng(0)
    points = uniform(args.n, 2, rng=rng)
    factorize(points[:2000], KERNEL, None, tol=1e-6, rng=0)  # load compiled code
    dense = DenseCholesky(points, KERNEL)
    data = {"white noise": rng.standard_normal(args.n),
            "smooth field": dense.apply_sqrt(rng.standard_normal(args.n))}
    exact = {name: loglik(float(y @ dense.solve(y)), dense.logdet(), args.n)
             for name, y in data.items()}
    del dense
    results = {}
    for name, changes in variants(args.n).items():
        results[name] = run_variant(changes, points, data, exact, args.tol, args.seeds)
        for row in results[name]:
            err = row["median_abs_loglik_error"]
            print(f"{name:22s} tol {row['tol']:.0e}: white {err['white noise']:.3g}, "
                  f"smooth {err['smooth field']:.3g} nat; {row['median_seconds']:.2f} s "
                  f"(factor {row['median_factor_seconds']:.2f} s)", flush=True)
    part_times = parts(args.repeats, args.operator_n)
    print(part_times)
    write_run(args.json, "hodlr_variants", argv, info, unit=unit, n=args.n, seeds=args.seeds,
              exact_loglik=exact, variants=results, parts=part_times)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
