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

One column rate overprices wide blocks: a product evaluates its n^2 kernel entries once,
whatever its width k, so its time is n^2 (e + k c) with e the cost of an entry and c that
of one multiply-add column. Development measurement (2D Matern 3/2, 2 cores): at
n = 16,384 a product of 8 columns took 0.46 s and one of 64 columns 0.83 s, so e is about
60 c; the column rate of 8 columns at 1,024 points (1.2e9) was 17x below that of 64
columns at 16,384 (2.1e10). ``ProductCost`` keeps both constants, measured from two
widths (``measure_product_cost``), and ``operator_evaluation_seconds`` prices each
product call of an evaluation at its own width.
"""

from __future__ import annotations

import time
from collections.abc import Callable
from dataclasses import asdict, dataclass

import numpy as np

from harness.model.kernels import Kernel


@dataclass(frozen=True)
class ProductCost:
    """Measured cost of exact products (module docstring): Sigma B with k columns takes
    n^2 (``entry_seconds`` + k ``column_seconds``); the p derivative products
    dSigma/dtheta_i B at once take n^2 (``derivative_entry_seconds`` + p k
    ``column_seconds``). Each constant is seconds per n^2 kernel entries; measured at
    ``n`` points with the widths ``widths``."""

    entry_seconds: float
    column_seconds: float
    derivative_entry_seconds: float
    n: int
    widths: tuple[int, ...]
    family: str

    def product_seconds(self, n: int, width: int, calls: int = 1) -> float:
        """Seconds of ``calls`` products Sigma B of ``width`` columns at n points."""
        return calls * float(n) ** 2 * (self.entry_seconds + width * self.column_seconds)

    def derivative_seconds(self, n: int, width: int, n_params: int, calls: int = 1) -> float:
        """Seconds of ``calls`` derivative products (all n_params at once) of ``width``
        columns at n points."""
        return calls * float(n) ** 2 * (self.derivative_entry_seconds
                                        + n_params * width * self.column_seconds)

    def column_rate(self, width: int) -> float:
        """n^2-entry columns per second in products of ``width`` columns."""
        return width / (self.entry_seconds + width * self.column_seconds)

    def to_dict(self) -> dict[str, object]:
        return asdict(self)


#: Points of the timed products (``measure_product_cost``): enough for the products'
#: tiles to run at their large-n rate. Development measurement (2D Matern 3/2, 2 cores),
#: nanoseconds per kernel entry of a product of 1 and 64 columns: 2.5 and 3.7 at 4,096
#: points, 1.4 and 3.2 at 8,192, 1.3 and 3.1 at 16,384 and 32,768 (the 64-column product
#: takes about 0.2 s at 8,192 points).
PRODUCT_N = 8192


def measure_product_cost(kernel: Kernel, *, dimension: int = 2, n: int = PRODUCT_N,
                         widths: tuple[int, int] = (1, 64), derivative_width: int = 16,
                         repeats: int = 3, rng: np.random.Generator | int | None = None
                         ) -> ProductCost:
    """``ProductCost`` from products at n uniform points in the unit cube: Sigma B at the
    two ``widths`` (c from their difference, e from the narrower) and the derivative
    products at ``derivative_width``, each the median of ``repeats`` after a warm-up.
    e and the derivatives' entry cost are held at least 0 (a measurement below the
    columns' share is noise)."""
    from harness.references.operator.products import KernelOperator

    narrow, wide = sorted(int(w) for w in widths)
    if not 1 <= narrow < wide:
        raise ValueError(f"widths must be two different positive numbers, got {widths!r}")
    gen = np.random.default_rng(rng)
    points = gen.random((n, dimension))
    block = gen.standard_normal((n, max(wide, derivative_width)))
    op = KernelOperator(points, kernel, progress=False)
    op.matvec(block[:, :1])                     # compile / warm caches
    op.derivative_matvecs(block[:, :1])

    def median_seconds(call: Callable[[], object]) -> float:
        times = []
        for _ in range(repeats):
            start = time.perf_counter()
            call()
            times.append(time.perf_counter() - start)
        return float(np.median(times))

    square = float(n) ** 2
    t_narrow = median_seconds(lambda: op.matvec(block[:, :narrow])) / square
    t_wide = median_seconds(lambda: op.matvec(block[:, :wide])) / square
    column = max((t_wide - t_narrow) / (wide - narrow), t_wide / wide * 1e-3)
    t_derivative = median_seconds(
        lambda: op.derivative_matvecs(block[:, :derivative_width])) / square
    p = kernel.n_params
    return ProductCost(entry_seconds=max(t_narrow - narrow * column, 0.0),
                       column_seconds=column,
                       derivative_entry_seconds=max(t_derivative
                                                    - p * derivative_width * column, 0.0),
                       n=n, widths=(narrow, wide, derivative_width), family=kernel.family)


def operator_evaluation_seconds(n: int, cost: ProductCost, *, n_params: int = 3,
                                mean_columns: int = 0, probes: int = 16,
                                probe_batch: int = 16, steps: int = 8,
                                lanczos_steps: int | None = None,
                                score: bool = True) -> float:
    """Predicted seconds of the products of one ``operator_evaluate`` at n points, each
    call priced at its width (module docstring), with the counts of
    ``predicted_column_products``: CG for [y, F], ``steps`` + 2 calls of 2 + q columns;
    per batch of at most ``probe_batch`` probes, Lanczos ``lanczos_steps`` + 1 calls
    (``steps`` when None) and, with the score, CG ``steps`` + 2 calls and one derivative
    product; with the score, one derivative product of the 1 + q GLS columns. The counts
    measured on a window of the data (``iteration_counts``) make the estimate a
    prediction."""
    lanczos = steps if lanczos_steps is None else lanczos_steps
    seconds = cost.product_seconds(n, 2 + mean_columns, calls=steps + 2)
    batches = [min(probe_batch, probes - start) for start in range(0, probes, probe_batch)]
    for width in batches:
        seconds += cost.product_seconds(n, width, calls=lanczos + 1)
        if score:
            seconds += (cost.product_seconds(n, width, calls=steps + 2)
                        + cost.derivative_seconds(n, width, n_params))
    if score:
        seconds += cost.derivative_seconds(n, 1 + mean_columns, n_params)
    return seconds


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


def estimate_operator_seconds(n: int, *, rate: float, n_params: int = 3,
                              mean_columns: int = 0, probes: int = 16, steps: int = 8,
                              score: bool = True) -> float:
    """Predicted seconds of one operator evaluation at n points (not counting the
    preconditioner's own factorization) at one column ``rate`` (n^2-entry columns per
    second, e.g. ``ProductCost.column_rate``): the estimate where no ``ProductCost`` was
    measured."""
    if n < 1:
        raise ValueError(f"n must be a positive number of points, got {n}")
    column_rate = float(rate)
    if not column_rate > 0:
        raise ValueError(f"rate must be > 0 columns per second, got {column_rate!r}")
    columns = predicted_column_products(n_params=n_params, mean_columns=mean_columns,
                                        probes=probes, steps=steps, score=score)
    return float(columns) * float(n) ** 2 / column_rate
