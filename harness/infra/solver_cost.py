"""The cost model's work of one likelihood-and-gradient evaluation by a solver, in flops.

One formula, shared by the grid's cost estimates (``harness.grid.cases.cost``, which states
the whole model, its sources and its calibration) and the default time limit of a call
into a built-in solver under test (``harness.infra.solver_timeout``):

- the dense solver: half the dense reference's work, n^3/3 (Cholesky) + 2 n^3/3 (inverse)
  + 2 p n^3 (Fisher products), twice (Golub & Van Loan, *Matrix Computations*, 4th ed.,
  section 4.2);
- a compressed solver: ``COMPRESSED_UNIT_FLOPS`` x n log2(n)^2 x a rank growing with
  log10(1/tol) (``rank``), times (1 + probes p / 50) for stochastic traces, plus
  ``EVAL_OVERHEAD_FLOPS``.

Every constant is in flops of dense work; ``DENSE_FLOPS`` is the assumed single-thread
dense rate where none was measured. The constants were fitted to measured runs of
``cases/smoke.toml`` on a 2-core machine (``benchmarks/results/cost_model.json``).

This module is infrastructure: it imports nothing from the rest of ``harness``.
"""

from __future__ import annotations

import math

__all__ = ["COMPRESSED_UNIT_FLOPS", "DEFAULT_RANK", "DENSE_FLOPS", "EVAL_OVERHEAD_FLOPS",
           "dense_flops", "evaluation_flops", "rank"]

#: Assumed single-thread dense throughput (flop/s) when none was measured.
DENSE_FLOPS = 7e9
#: Dense-work flops per (n log2(n)^2 rank) unit of one compressed evaluation with gradient.
COMPRESSED_UNIT_FLOPS = 400.0
#: Dense-work flops of the fixed cost of one compressed evaluation (tree, Python loops).
EVAL_OVERHEAD_FLOPS = 1.4e9
#: The rank assumed for a compressed solver without a tolerance.
DEFAULT_RANK = 20.0


def rank(tol: float | None) -> float:
    """The model's rank at tolerance ``tol``: 4 + 6 log10(1/tol); 0 without a tolerance."""
    return 4.0 + 6.0 * math.log10(1.0 / tol) if tol else 0.0


def dense_flops(n: int, p: int) -> tuple[float, int]:
    """Flops and bytes of the dense reference at ``n`` points with ``p`` parameters:
    Cholesky n^3/3, inverse 2n^3/3, Fisher 2 p n^3, twice (theta_0 and perturbed)."""
    flops = 2 * (n ** 3 / 3 + 2 * n ** 3 / 3 + 2 * p * n ** 3)
    return flops, int(8 * n * n * (p + 3))


def evaluation_flops(n: int, p: int, *, dense: bool, tol: float | None,
                     probes: int) -> tuple[float, int]:
    """Flops and bytes of one evaluation by the solver (module docstring); ``probes`` 0
    means exact traces."""
    if dense:
        return dense_flops(n, p)[0] / 2, 8 * n * n
    r = rank(tol) or DEFAULT_RANK
    log_n = max(math.log2(max(n, 2)), 1.0)
    units = n * log_n ** 2 * r
    flops = COMPRESSED_UNIT_FLOPS * units * (1 + probes * p / 50) + EVAL_OVERHEAD_FLOPS
    return flops, int(8 * n * r * log_n * 2)
