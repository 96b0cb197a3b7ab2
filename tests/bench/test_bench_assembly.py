"""Dense assembly against the Cholesky it feeds, at n = 8,000 (one run, same machine).

Target (issue 2): assembling Sigma costs at most a quarter of factoring it.
Run: ``pytest tests/bench --benchmark-only -n 0 -k assembly``.
"""

from __future__ import annotations

import time

import numpy as np
import pytest
from scipy.linalg import lapack

from harness.model.kernels import Gaussian, Matern, Matern32, assemble_lower

N = 8_000


@pytest.fixture(scope="module")
def points():
    return np.random.default_rng(0).random((N, 2))


@pytest.fixture(scope="module")
def warm(points):
    for kernel in (Matern32(1.0, 0.1, 0.01), Gaussian(1.0, 0.1, 0.01)):
        assemble_lower(kernel, points[:64])


def _median_seconds(fn, repeats=3):
    times = []
    for _ in range(repeats):
        start = time.perf_counter()
        fn()
        times.append(time.perf_counter() - start)
    return float(np.median(times))


@pytest.mark.benchmark(group="dense-8000")
def test_assembly_matern32(benchmark, points, warm):
    benchmark.pedantic(assemble_lower, args=(Matern32(1.0, 0.1, 0.01), points), rounds=3)


@pytest.mark.benchmark(group="dense-8000")
def test_cholesky(benchmark, points, warm):
    matrix = assemble_lower(Matern32(1.0, 0.1, 0.01), points)

    def setup():
        return (np.array(matrix, order="F"),), {}

    benchmark.pedantic(lambda a: lapack.dpotrf(a, lower=1, overwrite_a=1, clean=0),
                       setup=setup, rounds=3)


@pytest.mark.benchmark(group="dense-8000")
def test_assembly_over_cholesky_ratio(benchmark, points, warm):
    kernel = Matern32(1.0, 0.1, 0.01)
    assembly = _median_seconds(lambda: assemble_lower(kernel, points))
    matrix = assemble_lower(kernel, points)
    copies = [np.array(matrix, order="F") for _ in range(3)]
    cholesky = _median_seconds(lambda: lapack.dpotrf(copies.pop(), lower=1, overwrite_a=1,
                                                     clean=0))
    ratio = assembly / cholesky
    benchmark.extra_info.update(assembly_s=assembly, cholesky_s=cholesky, ratio=ratio)
    benchmark.pedantic(lambda: None, rounds=1)
    print(f"\nn = {N}: assembly {assembly:.3f} s, Cholesky {cholesky:.3f} s, ratio {ratio:.3f}")
    assert ratio <= 0.25, f"assembly/Cholesky = {ratio:.3f} > 0.25"


@pytest.mark.benchmark(group="dense-2000-bessel")
def test_assembly_general_matern(benchmark, points):
    benchmark.pedantic(assemble_lower, args=(Matern(1.0, 0.1, 0.01, nu=0.8), points[:2000]),
                       rounds=2)
