"""Where the HODLR compression spends its time: per tree level, and the root block alone.

Problem: the performance targets' setting (``hodlr_scaling.py``): 2D uniform points,
Matern 3/2, s2 = 1, l = 0.1, nugget 1e-2, leaf 128, two worker threads. One
factorization per (n, tol) after a warm-up at n = 2,000, with the solver's own ACA and
truncation timed block by block in this process (the two functions are wrapped, not
changed), so each level's thread-seconds add up the work the two workers share. The
root block is one task: when its ACA and truncation take about as long as the whole
phase's wall time, that one thread's work bounds the phase. Also recorded: how many
truncations had to form an explicit orthogonal basis (``orth.basis_factor``) and their
thread-seconds, and the phase walls of ``factorize``. Seconds and units of the same-run
unit (``machine_unit``).

The factorization's floating-point work is counted from the level ranks
(``factor_flops``) and set against the rate of the unit's own dpotrf (n^3 / 3 flops at
n = 8,192): their ratio says how far the factorization phase is from running at
LAPACK's dense rate on this machine. ``floor_units`` is what the two phases would take
at these ranks if the factorization ran at that rate and the compression's thread-
seconds were split evenly over the two threads: a floor for any implementation of this
method (same ranks, same compression work), in units.

Usage::

    python benchmarks/hodlr_phases.py --n 16000 131072 --tol 1e-6 1e-8 \
        --json benchmarks/results/hodlr_phases.json
"""

from __future__ import annotations

import argparse
import math
import time
from collections import defaultdict

import numpy as np
from machine_unit import machine, measure_unit, write_run

import harness.solvers.hodlr.aca as aca
import harness.solvers.hodlr.entries as entries
from harness.model.kernels import Matern32
from harness.solvers.hodlr import factorize


class BlockClock:
    """Thread-seconds of ACA and truncation per tree level, from wrapped functions."""

    def __init__(self, n: int) -> None:
        self.n = n
        self.aca: dict[int, list[float]] = defaultdict(list)
        self.aca_rank: dict[int, list[int]] = defaultdict(list)
        self.truncation: dict[int, list[float]] = defaultdict(list)
        self.explicit: list[float] = []

    def level(self, rows: int) -> int:
        return max(0, round(math.log2(self.n / rows)) - 1)

    def install(self) -> list[tuple[object, str, object]]:
        saved = [(entries.KernelEntries, "_aca", entries.KernelEntries._aca),
                 (entries, "recompress", entries.recompress),
                 (aca, "basis_factor", aca.basis_factor)]
        timed_aca, timed_recompress, timed_basis = (saved[0][2], saved[1][2], saved[2][2])
        clock = self

        def block_aca(self, rows, cols, *args, **kwargs):
            t = time.perf_counter()
            out = timed_aca(self, rows, cols, *args, **kwargs)
            level = clock.level(rows[1] - rows[0])
            clock.aca[level].append(time.perf_counter() - t)
            clock.aca_rank[level].append(int(out[0].shape[0]))
            return out

        def block_recompress(a, b, **kwargs):
            t = time.perf_counter()
            out = timed_recompress(a, b, **kwargs)
            clock.truncation[clock.level(a.shape[1])].append(time.perf_counter() - t)
            return out

        def basis(x, **kwargs):
            t = time.perf_counter()
            out = timed_basis(x, **kwargs)
            if out.explicit is not None:
                clock.explicit.append(time.perf_counter() - t)
            return out

        entries.KernelEntries._aca = block_aca
        entries.recompress = block_recompress
        aca.basis_factor = basis
        return saved


def factor_flops(n: int, leaf: int, ranks: list[tuple[float, int]]) -> float:
    """Dominant flops of ``factor.factor_symmetric`` from (mean rank, max rank) per level.

    Per node of level l with m rows and rank r (c = sum of the coarser levels' max
    ranks, the ancestor columns): the Gram matrices of its two bases, m r^2; the
    products U_a' X_a, U_b' X_b with the ancestor columns, 2 m r c; the update
    X_b -= U_b C, m r c. Summed over a level's nodes (their m add up to n):
    n (r^2 + 3 r c) with r the level's mean rank. The leaves' triangular solves on all
    levels' columns add n * leaf * (sum of max ranks). Multiply-adds count as 2 flops;
    second Cholesky QR passes are not counted, so this is a lower bound.
    """
    total = 0.0
    coarser = 0
    for mean, top in ranks:
        total += n * (mean * mean + 3.0 * mean * coarser)
        coarser += top
    return total + n * leaf * coarser


def run(n: int, tol: float) -> dict:
    kernel = Matern32(variance=1.0, lengthscale=0.1, nugget=1e-2)
    points = np.random.default_rng(0).random((n, 2))
    clock = BlockClock(n)
    saved = clock.install()
    try:
        f = factorize(points, kernel, None, tol=tol, rng=0)
    finally:
        for owner, name, value in saved:
            setattr(owner, name, value)
    levels = []
    for level in sorted(clock.aca):
        levels.append({"level": level, "blocks": len(clock.aca[level]),
                       "aca_thread_seconds": float(sum(clock.aca[level])),
                       "truncation_thread_seconds": float(sum(clock.truncation[level])),
                       "max_aca_rank": max(clock.aca_rank[level]),
                       "max_rank": f.ranks[level].max})
    root = levels[0]
    flops = factor_flops(n, 128, [(r.mean, r.max) for r in f.ranks])
    return {"n": n, "tol": tol, "phases": f.timings.to_dict(), "levels": levels,
            "factor_flops": flops,
            "factor_gflops_per_second": flops / f.timings.factor / 1e9,
            "root_seconds": root["aca_thread_seconds"] + root["truncation_thread_seconds"],
            "compression_thread_seconds": float(sum(row["aca_thread_seconds"]
                                                    + row["truncation_thread_seconds"]
                                                    for row in levels)),
            "explicit_bases": len(clock.explicit),
            "explicit_basis_thread_seconds": float(sum(clock.explicit))}


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--n", type=int, nargs="+", default=[131072])
    parser.add_argument("--tol", type=float, nargs="+", default=[1e-6, 1e-8])
    parser.add_argument("--json", default="benchmarks/results/hodlr_phases.json")
    args = parser.parse_args(argv)
    info = machine()
    unit = measure_unit()
    u = unit["seconds"]
    unit_gflops = unit["n"] ** 3 / 3.0 / u / 1e9
    print(f"unit: {unit['name']} = {u:.3f} s = {unit_gflops:.1f} GFlop/s "
          f"(load average {info['load_average']})")
    factorize(np.random.default_rng(1).random((2000, 2)),
              Matern32(variance=1.0, lengthscale=0.1, nugget=1e-2), None, tol=1e-6, rng=0)
    rows = []
    for n in args.n:
        for tol in args.tol:
            row = run(n, tol)
            p = row["phases"]
            row["units"] = {k: v / u for k, v in p.items()}
            row["factor_rate_over_dpotrf"] = row["factor_gflops_per_second"] / unit_gflops
            factor_floor = row["factor_flops"] / (unit_gflops * 1e9)
            compress_floor = row["compression_thread_seconds"] / 2.0
            row["floor_units"] = {"factor_at_dpotrf_rate": factor_floor / u,
                                  "compression_evenly_split": compress_floor / u,
                                  "total": (factor_floor + compress_floor) / u}
            print(f"n {n} tol {tol:g}: compress {p['compress']:.2f} s (root block "
                  f"{row['root_seconds']:.2f} s of one thread; all blocks "
                  f"{row['compression_thread_seconds']:.2f} thread-s; "
                  f"{row['explicit_bases']} explicit bases, "
                  f"{row['explicit_basis_thread_seconds']:.2f} thread-s), "
                  f"factor {p['factor']:.2f} s ({row['factor_flops']:.3g} flops, "
                  f"{row['factor_gflops_per_second']:.1f} GFlop/s = "
                  f"{row['factor_rate_over_dpotrf']:.2f} of dpotrf's rate); floor "
                  f"{row['floor_units']['total']:.2f} units, measured "
                  f"{row['units']['total']:.2f}", flush=True)
            rows.append(row)
    write_run(args.json, "hodlr_phases", argv, info, unit=unit,
              unit_gflops_per_second=unit_gflops, rows=rows)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
