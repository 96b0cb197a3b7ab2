"""Memory budget of the dense reference: estimate before assembling, refuse beyond it."""

from __future__ import annotations

from functools import cache

import psutil

#: Share of TOTAL physical memory the dense computations may use by default. A fixed
#: share of a fixed quantity, so the choice of reference and of fit is the same on every
#: run on a machine, whatever else is running at that moment. Why 0.6 (common practice,
#: covaudit's choice): a dense stage runs in a child process while the parent keeps the
#: data and the solver under test's factor, and the operating system keeps its page
#: cache; 40% is left to them.
DEFAULT_BUDGET_FRACTION = 0.6


class DenseBudgetError(MemoryError):
    """The dense reference would need more memory than its budget allows."""


@cache
def total_memory() -> int:
    """Bytes of total physical memory, read once per process (it does not change while
    the process runs)."""
    return int(psutil.virtual_memory().total)


def default_memory_budget() -> int:
    """Bytes the dense computations may use: ``DEFAULT_BUDGET_FRACTION`` of total
    physical memory."""
    return int(DEFAULT_BUDGET_FRACTION * total_memory())


#: Temporaries besides the squares, in doubles: the panel factorization
#: (``cholesky.blocked_cholesky``) works in place; the full DPOT01 certificate and the
#: derivative products hold four n x 1,024 column blocks (Sigma's block, its absolute
#: value, products).
_CERTIFICATE_COLUMNS = 4 * 1024


def _squares(score: bool, fisher: bool, n_params: int) -> int:
    return 1 + (1 if (score or fisher) else 0) + (n_params if fisher else 0)


def _temporary_doubles(n: int) -> int:
    return n * min(n, _CERTIFICATE_COLUMNS)


def dense_bytes_needed(n: int, *, score: bool = False, fisher: bool = False,
                       n_params: int = 0) -> int:
    """Peak bytes of a dense evaluation at n points.

    The factor is one n x n float64 array (assembled and factored in place); exact
    traces need Sigma^-1 (a second n x n); the Fisher information keeps
    Sigma^-1 dSigma/dtheta_i for every parameter (p more). The certificate's column
    blocks add ``_temporary_doubles(n)`` doubles;
    O(n) vectors and smaller blocks are covered by a 5% allowance.
    """
    squares = _squares(score, fisher, n_params)
    return int(1.05 * 8 * (squares * n * n + _temporary_doubles(n)))


def largest_dense_n(budget: int, *, score: bool = False, fisher: bool = False,
                    n_params: int = 0) -> int:
    """The largest n whose dense evaluation fits in ``budget`` bytes."""
    squares = _squares(score, fisher, n_params)
    n = int((budget / (1.05 * squares * 8)) ** 0.5)
    while n > 0 and dense_bytes_needed(n, score=score, fisher=fisher,
                                       n_params=n_params) > budget:
        n -= max(1, n // 1000)
    return n


def _what(score: bool, fisher: bool, n_params: int) -> str:
    """Which dense computation a budget message is about (its n x n arrays differ)."""
    if fisher:
        return (f"the dense Fisher information (factor, inverse and {n_params} derivative "
                "products, n x n each)")
    if score:
        return "the dense log-likelihood with score (factor and inverse, n x n each)"
    return "the dense factorization (one n x n factor)"


def check_dense_budget(n: int, *, budget: int | None, score: bool = False,
                       fisher: bool = False, n_params: int = 0) -> int:
    """Raise ``DenseBudgetError`` when a dense evaluation at n would exceed the budget.

    Returns the bytes needed. The message gives n, the bytes needed, the budget, the
    largest n that fits and what to do instead.
    """
    limit = default_memory_budget() if budget is None else int(budget)
    needed = dense_bytes_needed(n, score=score, fisher=fisher, n_params=n_params)
    if needed > limit:
        fits = largest_dense_n(limit, score=score, fisher=fisher, n_params=n_params)
        raise DenseBudgetError(
            f"{_what(score, fisher, n_params)} at n = {n:,} needs about "
            f"{needed / 2**30:.2f} GiB "
            f"but the memory budget is {limit / 2**30:.2f} GiB (largest n that fits: {fits:,}). "
            "Use a structured reference (--solver statespace for 1D Matern 1/2, 3/2, 5/2; "
            "--solver kronecker for separable kernels on tensor grids), audit on a spatial "
            "subsample, or raise the budget (--memory-budget)."
        )
    return needed
