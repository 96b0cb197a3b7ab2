"""Solve, trace-estimator and whole likelihood-plus-score costs of the built-in solver.

Run with ``pytest tests/bench --benchmark-only -n 0 -k likelihood``. Setting as in
``test_bench_hodlr.py`` (2D uniform, Matern 3/2, s2 = 1, l = 0.1, nugget 1e-2, leaf 128,
tol 1e-6). Target (issue 3): one log-likelihood + score evaluation (3 parameters,
Hutch++ with 64 products) at n = 128,000 within 60 s, factorization included.
"""

from __future__ import annotations

import time

import numpy as np
import pytest

from harness.likelihood import evaluate_likelihood
from harness.model.kernels import Matern32
from harness.solvers.registry import resolve_solver

KERNEL = Matern32(variance=1.0, lengthscale=0.1, nugget=1e-2)


def _problem(n: int) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(0)
    return rng.random((n, 2)), rng.standard_normal(n)


def _factor(points: np.ndarray):
    return resolve_solver("hodlr").factorize(points, KERNEL, tol=1e-6,
                                             rng=np.random.default_rng(1))


@pytest.fixture(scope="module")
def factored_16k():
    points, y = _problem(16_000)
    _factor(points[:2000])  # load compiled code
    return points, y, _factor(points)


@pytest.mark.benchmark(group="hodlr-16k-phases")
def test_bench_solve_16k(benchmark, factored_16k):
    _, y, fac = factored_16k
    rhs = np.column_stack([y] * 16)
    benchmark.pedantic(fac.solve, args=(rhs,), rounds=3, iterations=1)


@pytest.mark.benchmark(group="hodlr-16k-phases")
@pytest.mark.parametrize("trace", ["hutchinson", "hutchpp"])
def test_bench_score_with_trace_estimator_16k(benchmark, factored_16k, trace):
    points, y, fac = factored_16k
    benchmark.pedantic(
        lambda: evaluate_likelihood(fac, points, y, KERNEL, mean="constant", trace=trace,
                                    probes=64, rng=np.random.default_rng(2)),
        rounds=2, iterations=1)


@pytest.mark.benchmark(group="hodlr-128k-likelihood")
def test_bench_likelihood_and_score_128k(benchmark):
    points, y = _problem(128_000)
    _factor(points[:2000])

    def one_evaluation() -> float:
        start = time.perf_counter()
        fac = _factor(points)
        evaluate_likelihood(fac, points, y, KERNEL, mean="constant", trace="hutchpp",
                            probes=64, rng=np.random.default_rng(2))
        return time.perf_counter() - start

    seconds = benchmark.pedantic(one_evaluation, rounds=1, iterations=1)
    benchmark.extra_info.update(seconds=seconds)
    print(f"\nn = 128,000: factorization + log-likelihood + score (Hutch++, 64) {seconds:.1f} s")
    assert seconds <= 60.0, f"{seconds:.1f} s > 60 s"
