"""Which fit a check runs: decided by n and the memory budget, never by a timing.

* ``dense``: screened starts, L-BFGS-B and a Fisher-scoring polish with the exact score
  and Fisher information (``harness.check.fitting.fit_dense``), when the dense
  log-likelihood with its score and Fisher information fits the memory budget and
  n <= ``DENSE_FIT_MAX_N``;
* ``vecchia``: the at-scale fit otherwise (``harness.check.vecchia_fit``): Fisher scoring
  on the deterministic Vecchia likelihood, then a refinement toward the exact MLE with
  the exact score where the dense score fits the budget;
* ``statespace``: in place of ``vecchia`` on a line with a half-integer Matern kernel
  (where the state-space reference applies): the exact MLE by the Kalman filter's O(n)
  likelihood and score (``harness.check.line_fit``), no approximation at any n;
* ``compressed``: in place of ``vecchia`` for a kernel without a compiled form for the
  Vecchia likelihood (``harness.model.kernels.assembly.FAMILY_CODES``): Fisher scoring
  with the compressed solver's stochastic score.

The same data and options give the same plan on every machine state: the decision reads
n, the number of parameters and the configured memory budget (its default a fixed share
of total physical memory, ``harness.linalg.dense_budget``), never a clock or the
momentary free memory. ``--fit-time-budget`` caps the fit stage; it does not choose it.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from harness.audit.reference_choice import NoReference, ReferenceProblem, select_reference
from harness.linalg.dense_budget import DenseBudgetError, check_dense_budget
from harness.model.kernels import Kernel
from harness.model.kernels.assembly import FAMILY_CODES

#: The largest n fitted by the dense fit (covaudit's choice). That fit makes about 40
#: dense evaluations with the score and a few with the Fisher information, each
#: O(n^3) (Cholesky factor and inverse, Golub and Van Loan 2013, sec. 4.2): at 4,096
#: points one evaluation is about 1e11 flops, so the whole fit stays near a minute at
#: a few tens of GFlop/s, while the at-scale fit needs at most three dense score
#: evaluations and no dense Fisher information at all.
DENSE_FIT_MAX_N = 4096

PLAN_ENGINES = ("dense", "vecchia", "statespace", "compressed")


@dataclass(frozen=True)
class FitPlan:
    """Which fit runs, and why.

    Attributes
    ----------
    engine : str
        ``dense``, ``vecchia``, ``statespace`` or ``compressed`` (``PLAN_ENGINES``).
    reason : str
    dense_max_n : int
        The n threshold the plan used.
    exact_score_fits : bool
        Whether the dense log-likelihood with its score (no Fisher information) fits the
        memory budget: the at-scale fit's exact refinement needs it.
    time_budget : float
        Seconds the fit stage may take (a cap, not part of the choice).
    """

    engine: str
    reason: str
    dense_max_n: int
    exact_score_fits: bool
    time_budget: float

    def to_dict(self) -> dict[str, object]:
        return {"engine": self.engine, "reason": self.reason,
                "estimated_dense_seconds": None, "time_budget": self.time_budget,
                "dense_fit_max_n": self.dense_max_n,
                "exact_score_fits": self.exact_score_fits}


def line_applies(d: int, kernel: Kernel) -> bool:
    """Whether the exact fit on a line applies: the state-space reference's own test
    (``harness.audit.reference_choice``: 1D points, a half-integer Matern kernel)."""
    problem = ReferenceProblem(n=1, d=int(d), kernel=kernel)
    try:
        select_reference(problem, allowed=("statespace",))
    except NoReference:
        return False
    return True


def _fits(n: int, budget: int | None, *, fisher: bool, n_params: int) -> str | None:
    """None when the dense evaluation fits the budget, else the budget's message."""
    try:
        check_dense_budget(n, budget=budget, score=True, fisher=fisher, n_params=n_params)
    except DenseBudgetError as exc:
        return str(exc)
    return None


def plan_fit(n: int, n_params: int, *, family: str, memory_budget: int | None,
             time_budget: float, dense_max_n: int = DENSE_FIT_MAX_N,
             on_line: bool = False) -> FitPlan:
    """The fit for n points and ``n_params`` parameters (module docstring).

    Parameters
    ----------
    n, n_params : int
    family : str
        The kernel family (whether the Vecchia likelihood can evaluate it).
    memory_budget : int or None
        Bytes (None: ``harness.linalg.dense_budget.default_memory_budget``).
    time_budget : float
        Recorded in the plan; the fit stage stops there.
    dense_max_n : int
        n above which the at-scale fit runs (``DENSE_FIT_MAX_N``; 0 forces it).
    on_line : bool
        The points are 1D and the kernel a half-integer Matern (``line_applies``): the
        at-scale fit is then the exact one on the line.
    """
    exact_score_fits = _fits(n, memory_budget, fisher=False, n_params=n_params) is None
    if on_line:
        at_scale, why_not = "statespace", "; on a line: the exact Kalman-filter fit"
    elif family in FAMILY_CODES:
        at_scale, why_not = "vecchia", ""
    else:
        at_scale, why_not = ("compressed", f"; kernel {family!r} has no compiled form for "
                                           "the Vecchia likelihood")
    if n > dense_max_n:
        return FitPlan(at_scale, f"n = {n:,} above the dense fit's limit of "
                                 f"{dense_max_n:,} points{why_not}", dense_max_n,
                       exact_score_fits, time_budget)
    fisher_problem = _fits(n, memory_budget, fisher=True, n_params=n_params)
    if fisher_problem is not None:
        return FitPlan(at_scale, f"dense fit over the memory budget: {fisher_problem}"
                                 f"{why_not}", dense_max_n, exact_score_fits, time_budget)
    return FitPlan("dense", f"n = {n:,} within the dense fit's limit of {dense_max_n:,} "
                            "points and the memory budget", dense_max_n, exact_score_fits,
                   time_budget)


def plan_fixed_fisher(n: int, n_params: int, *, family: str, memory_budget: int | None,
                      dense_max_n: int = DENSE_FIT_MAX_N) -> FitPlan:
    """Where the Fisher information at fixed parameters (``--fixed-params``) is computed:
    by the engine the fit would use (``plan_fit``), so dense only within the dense fit's
    limit of n and the budget, else the deterministic Vecchia information (O(n m^2)),
    else Hutch++ with the compressed solver. Never the line's observed information: away
    from the MLE it need not be positive definite."""
    return plan_fit(n, n_params, family=family, memory_budget=memory_budget,
                    time_budget=math.inf, dense_max_n=dense_max_n, on_line=False)
