"""The default time limit of one call into the solver under test, chosen from n.

``check`` runs each (tolerance, seed) audit of the solver under test, and ``evaluate`` its
one evaluation, in a child process (``harness.infra.child_process``); a call that runs
longer than its limit is stopped and reported as a failed solver (exit code 3,
``harness.infra.exit_codes``). Without ``--solver-timeout`` (``check``) or
``--task-timeout`` (``evaluate``) the limit is

    T(n) = BASE_SECONDS * max(1, n / BASE_N) ** GROWTH,

one hour up to 100,000 points, then growing like n^1.5: 31.6 hours at 10^6 points.

Why these numbers (a rule of thumb chosen for covaudit, not a published standard): the
limit is there to end a hang, never to judge speed, so it must be far above any honest
call. One call of the audit is two factorizations, about (p + 1)(k + 1) solves and as
many derivative products; the built-in HODLR solver factors 131,072 points in 19 s at
tol 1e-6 on two cores (``benchmarks/results/hodlr_scaling.json``), so an hour leaves a
solver more than a hundred times slower than it room at 100,000 points. Compressed
solvers cost O(n log^2 n) (HODLR) or O(n m^3) (Vecchia), so growth like n^1.5 beyond
keeps at least that margin for any of them; a dense O(n^3) solver past 100,000 points
would exceed its memory before this limit.

This module is infrastructure: it imports nothing from the rest of ``harness``.
"""

from __future__ import annotations

import math
import numbers

__all__ = ["BASE_N", "BASE_SECONDS", "GROWTH", "default_solver_timeout"]

#: Seconds allowed to one call into the solver under test up to ``BASE_N`` points.
BASE_SECONDS = 3600.0
#: Points up to which the limit is ``BASE_SECONDS``.
BASE_N = 100_000
#: Power of n / BASE_N by which the limit grows beyond ``BASE_N``.
GROWTH = 1.5


def default_solver_timeout(n: int) -> float:
    """Seconds one call into the solver under test may take at ``n`` points (module
    docstring: T(n) = 3600 s * max(1, n / 100,000)^1.5).

    Raises
    ------
    ValueError
        When ``n`` is not a positive whole number.
    """
    if isinstance(n, bool) or not isinstance(n, numbers.Integral) or n < 1:
        raise ValueError(f"default_solver_timeout: expected a positive number of points, "
                         f"got {n!r}")
    return BASE_SECONDS * math.pow(max(1.0, int(n) / BASE_N), GROWTH)
