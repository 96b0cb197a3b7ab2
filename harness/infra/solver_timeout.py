"""The default time limit of one call into the solver under test: from its cost estimate
where the cost model has one, else from n.

``check`` runs each (tolerance, seed) audit of the solver under test, and ``evaluate`` its
one evaluation, in a child process (``harness.infra.child_process``); a call that runs
longer than its limit is stopped and reported as a failed solver (exit code 3,
``harness.infra.exit_codes``). Without ``--solver-timeout`` (``check``) or
``--task-timeout`` (``evaluate``) the limit is

    T = ESTIMATE_FACTOR * estimate + ESTIMATE_MARGIN_SECONDS  (10 x estimate + 60 s)

where the cost model gives an estimate of the call's seconds (``timeout_from_estimate``;
the built-in dense and HODLR solvers, ``harness.infra.solver_cost``), and otherwise (a
plugin, Vecchia, whose knob the model has no rank for) the rule of n

    T(n) = BASE_SECONDS * max(1, n / BASE_N) ** GROWTH,

one hour up to 100,000 points, then growing like n^1.5: 31.6 hours at 10^6 points. The
estimate's rule follows the model's own error: it missed measured runs by up to a factor
3 on a loaded machine (``harness.grid.cases.cost``), so ten times the estimate leaves
room for that and a slower machine, and the 60 s cover start-up and first-call
compilation, which the model leaves out of a call.

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

__all__ = ["BASE_N", "BASE_SECONDS", "ESTIMATE_FACTOR", "ESTIMATE_MARGIN_SECONDS", "GROWTH",
           "RULE_TEXT", "default_solver_timeout", "solver_call_timeout",
           "timeout_from_estimate"]

#: Seconds allowed to one call into the solver under test up to ``BASE_N`` points.
BASE_SECONDS = 3600.0
#: Points up to which the limit is ``BASE_SECONDS``.
BASE_N = 100_000
#: Power of n / BASE_N by which the limit grows beyond ``BASE_N``.
GROWTH = 1.5
#: The limit is this many times the cost estimate of the call ...
ESTIMATE_FACTOR = 10.0
#: ... plus these seconds.
ESTIMATE_MARGIN_SECONDS = 60.0
#: The rule in words, for the options' ``--help``.
RULE_TEXT = ("10 x the call's cost estimate + 60 s for the built-in dense and hodlr "
             "solvers; otherwise one hour up to 100,000 points, growing like n^1.5 beyond")


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


def timeout_from_estimate(seconds: float) -> float:
    """``ESTIMATE_FACTOR * seconds + ESTIMATE_MARGIN_SECONDS`` (module docstring).

    Raises
    ------
    ValueError
        When ``seconds`` is negative or not finite.
    """
    if not (math.isfinite(seconds) and seconds >= 0):
        raise ValueError(f"timeout_from_estimate: expected a finite, non-negative estimate "
                         f"in seconds, got {seconds!r}")
    return ESTIMATE_FACTOR * float(seconds) + ESTIMATE_MARGIN_SECONDS


def solver_call_timeout(n: int, estimate: float | None = None) -> float:
    """The default limit of one call at ``n`` points: from ``estimate`` (seconds of the
    call by the cost model) when there is one, else ``default_solver_timeout(n)``."""
    if estimate is None:
        return default_solver_timeout(n)
    return timeout_from_estimate(estimate)
