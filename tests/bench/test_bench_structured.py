"""Structured exact references at a million points (run: pytest tests/bench --benchmark-only -n 0).

Targets: Kalman log-likelihood + analytic (sensitivity-recursion) score at n = 1e6
under 30 s per family; Kronecker log-likelihood + analytic score on a 1000 x 1000 grid under 60 s.
"""

import numpy as np
import pytest

from harness.geometry.pointsets import tensor_grid
from harness.model.kernels import Exponential, Matern32, Matern52
from harness.references.kronecker import KroneckerReference, SeparableKernel
from harness.references.statespace import StateSpaceReference

N = 1_000_000


@pytest.mark.parametrize("cls", [Exponential, Matern32, Matern52], ids=lambda c: c.family)
def test_kalman_million_points(benchmark, cls):
    rng = np.random.default_rng(0)
    x = rng.random(N)
    y = rng.standard_normal(N)
    kernel = cls(variance=1.0, lengthscale=0.01, nugget=0.1)

    def run():
        return StateSpaceReference(x, kernel).evaluate(y, mean="constant", score=True)

    ev = benchmark.pedantic(run, rounds=1, iterations=1)
    assert np.isfinite(ev.loglik) and np.all(np.isfinite(ev.score))
    assert benchmark.stats.stats.max < 30.0


@pytest.mark.parametrize("fisher", [False, True], ids=["score", "score+fisher"])
def test_kronecker_million_points(benchmark, fisher):
    pts = tensor_grid((1000, 1000))
    y = np.random.default_rng(1).standard_normal(pts.shape[0])
    kernel = SeparableKernel(Matern32(variance=1.0, lengthscale=(0.1, 0.2), nugget=0.1))

    def run():
        return KroneckerReference(pts, kernel).evaluate(y, mean="constant", score=True,
                                                        fisher=fisher)

    ev = benchmark.pedantic(run, rounds=1, iterations=1)
    assert np.isfinite(ev.loglik) and np.all(np.isfinite(ev.score))
    assert benchmark.stats.stats.max < 60.0
