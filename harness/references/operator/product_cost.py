"""Cost model of the operator reference from a measured product rate.

One exact block product with k columns and q outputs (Sigma, or one per derivative)
evaluates n^2 / 2 kernel entries per output and does 2 n^2 k multiply-adds per output,
so its time is close to  t = n^2 q (c_e + k c_m) / rate-constants. We measure the time
of one product at a small n and scale by (n / n_0)^2 (the tile work dominates beyond a
few thousand points; common practice for O(n^2) kernels):

    seconds(n) ~ column_products(n) * n^2 / column_rate,

column_rate = n_0^2 k_0 / t_0 (n^2-entry columns per second) from one product of k_0
columns at n_0. The number of column products of one evaluation is predicted from the
iteration counts typical for a preconditioner that is good to ~1e-8 (the defaults: CG
and Lanczos of about ``steps`` steps, ``probes`` probes); they are estimates, and
``operator_evaluate`` reports the actual ``products``.
"""

from __future__ import annotations

import time
from dataclasses import asdict, dataclass

import numpy as np

from harness.model.kernels import Kernel


@dataclass(frozen=True)
class ProductRate:
    """Measured speed of exact products: n^2-entry columns per second."""

    column_rate: float
    n: int
    k: int
    seconds: float
    family: str

    def to_dict(self) -> dict[str, object]:
        return asdict(self)


def measure_product_rate(kernel: Kernel, *, dimension: int = 2, n: int = 4096, k: int = 16,
                         rng: np.random.Generator | int | None = None) -> ProductRate:
    """Time one product Sigma B at n uniform points in the unit cube (after a warm-up)."""
    from harness.references.operator.products import KernelOperator

    gen = np.random.default_rng(rng)
    points = gen.random((n, dimension))
    block = gen.standard_normal((n, k))
    op = KernelOperator(points, kernel, progress=False)
    op.matvec(block[:, :1])                     # compile / warm caches
    start = time.perf_counter()
    op.matvec(block)
    seconds = time.perf_counter() - start
    return ProductRate(column_rate=n * n * k / seconds, n=n, k=k, seconds=seconds,
                       family=kernel.family)


def predicted_column_products(*, n_params: int, mean_columns: int = 0, probes: int = 16,
                              steps: int = 8, score: bool = True) -> int:
    """Column products of one ``operator_evaluate`` (an estimate; see module docstring).

    CG for [y, F] and the GLS residual: (steps + 2) (2 + mean_columns); Lanczos: probes
    (steps + 1); with the score, CG per probe probes (steps + 2) and derivative products
    n_params (probes + 1 + mean_columns).
    """
    total = (steps + 2) * (2 + mean_columns) + probes * (steps + 1)
    if score:
        total += probes * (steps + 2) + n_params * (probes + 1 + mean_columns)
    return int(total)


def estimate_operator_seconds(n: int, *, rate: ProductRate | float, n_params: int = 3,
                              mean_columns: int = 0, probes: int = 16, steps: int = 8,
                              score: bool = True) -> float:
    """Predicted seconds of one operator evaluation at n points (not counting the
    preconditioner's own factorization). ``rate`` is a ``ProductRate`` or its
    ``column_rate`` (n^2-entry columns per second)."""
    if n < 1:
        raise ValueError(f"n must be a positive number of points, got {n}")
    column_rate = rate.column_rate if isinstance(rate, ProductRate) else float(rate)
    if not column_rate > 0:
        raise ValueError(f"rate must be > 0 columns per second, got {column_rate!r}")
    columns = predicted_column_products(n_params=n_params, mean_columns=mean_columns,
                                        probes=probes, steps=steps, score=score)
    return float(columns) * float(n) ** 2 / column_rate
