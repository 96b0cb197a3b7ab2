"""This machine's dense rate: a timed Cholesky factorization (LAPACK dpotrf) at a small n.

One measured number calibrates every cost estimate in dense-work units: the grid's cost
model (``harness.grid.cases.cost``) and a check's cost plan
(``harness.check.plan_calibration``, which scales the probe to the project's unit, one
dpotrf at n = 8,192). The probe runs on one BLAS thread: a multi-threaded probe on a
loaded machine varies tenfold from call to call, while one thread gets its core.
"""

from __future__ import annotations

import time
from dataclasses import dataclass

import numpy as np

__all__ = ["PROBE_N", "DenseRate", "measure_dense_rate"]

#: Matrix size of the dense-rate probe.
PROBE_N = 1024


@dataclass(frozen=True)
class DenseRate:
    """A measured dense rate: ``flops`` per second from a Cholesky of size ``n`` that took
    ``seconds`` (the median of the repeats)."""

    flops: float
    n: int
    seconds: float

    def to_dict(self) -> dict[str, float | int]:
        return {"flops_per_second": self.flops, "n": self.n, "seconds": self.seconds}


def measure_dense_rate(*, n: int = PROBE_N, repeats: int = 5,
                       rng: np.random.Generator | int | None = None) -> DenseRate:
    """Time ``scipy.linalg.cho_factor`` (LAPACK dpotrf) on an n x n SPD matrix, on one
    BLAS thread (module docstring).

    Returns the rate n^3/3 / (median seconds) (Golub & Van Loan, *Matrix Computations*,
    4th ed., section 4.2: Cholesky costs n^3/3 flops).
    """
    from scipy.linalg import cho_factor
    from threadpoolctl import threadpool_limits

    if n < 64 or repeats < 1:
        raise ValueError(f"measure_dense_rate: n must be >= 64 and repeats >= 1, got "
                         f"n={n}, repeats={repeats}")
    gen = np.random.default_rng(rng)
    a = gen.standard_normal((n, n))
    spd = a @ a.T / n + np.eye(n)
    times = []
    with threadpool_limits(limits=1, user_api="blas"):
        for _ in range(repeats):
            start = time.perf_counter()
            cho_factor(spd, lower=True, overwrite_a=False, check_finite=False)
            times.append(time.perf_counter() - start)
    seconds = float(np.median(times))
    return DenseRate(flops=n ** 3 / 3 / max(seconds, 1e-9), n=n, seconds=seconds)
