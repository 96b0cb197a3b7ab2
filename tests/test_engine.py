"""The audit engine's rule (metric -> tolerance -> recommendation) and the solver seeds.

The rule is covaudit's own (DEVELOPERS.md, The verdict rule); the expected values below
follow from its definition: safe when |e| + 2 SE <= limit, unsafe when |e| - 2 SE > limit, else
unresolved; the worst seed decides; the ladder is never the sole basis of safe.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from harness.audit.engine import LADDER_FACTOR
from harness.audit.rule import (
    LADDER_REASON,
    UNCONVERGED_REASON,
    ReferenceInfo,
    judge_metric,
    recommend,
    spread,
    tolerance_verdict,
    worst,
)
from harness.audit.solver_seeds import (
    SOLVER_KEY,
    SolverSeedError,
    seed_option,
    seeded_options,
    solver_seed,
    solver_seeds,
)
from harness.grid.tasks import Task

DENSE = ReferenceInfo("dense", True)


@pytest.mark.parametrize("error, se, status", [
    (0.05, 0.02, "safe"),          # 0.05 + 0.04 = 0.09 <= 0.1
    (0.06, 0.02, "safe"),          # 0.10 <= 0.1: the boundary is inside
    (0.07, 0.02, "unresolved"),    # 0.11 > 0.1 but 0.03 <= 0.1
    (0.15, 0.02, "unsafe"),        # 0.11 > 0.1
    (-0.15, 0.02, "unsafe"),       # |e| is judged
    (0.14, 0.02, "unresolved"),    # 0.14 - 0.04 = 0.10 is not > 0.1
    (0.01, math.nan, "unresolved"),
    (math.nan, 0.0, "unresolved"),
    (math.inf, 0.0, "unresolved"),
])
def test_metric_rule(error, se, status):
    assert judge_metric("loglik_error", error, 0.1, se=se).status == status


def test_deterministic_bound_widens_the_interval():
    assert judge_metric("m", 0.05, 0.1, bound=0.04).status == "safe"
    assert judge_metric("m", 0.05, 0.1, bound=0.06).status == "unresolved"


def test_worst_seed_decides_and_spread_is_min_median_max():
    seeds = [[judge_metric("loglik_error", e, 0.1)] for e in (0.01, 0.2, 0.03)]
    v = tolerance_verdict(1e-4, seeds, reference=DENSE)
    assert v.status == "unsafe" and v.seeds == 3
    assert v.metrics[0].value == 0.2
    sp = v.spread["loglik_error"]
    assert (sp.minimum, sp.median, sp.maximum) == (0.01, 0.03, 0.2)
    assert worst([judge_metric("m", 0.09, 0.1), judge_metric("m", 0.01, 0.1)]).value == 0.09


def test_zero_seeds_or_missing_metric_is_never_safe():
    assert tolerance_verdict(1e-4, [], reference=DENSE).status == "unresolved"
    one = [[judge_metric("loglik_error", 0.0, 0.1)]]
    v = tolerance_verdict(1e-4, one, reference=DENSE, required=["kriging_mean_sd"])
    assert v.status == "unresolved"
    assert any("kriging_mean_sd: not measured" in r for r in v.reasons)


def test_ladder_only_is_at_best_unresolved_and_uncertified_reference_too():
    good = [[judge_metric("loglik_error", 1e-6, 0.1)]]
    ladder = tolerance_verdict(1e-4, good, reference=ReferenceInfo("ladder", True))
    assert ladder.status == "unresolved" and LADDER_REASON in ladder.reasons
    bad = [[judge_metric("loglik_error", 1.0, 0.1)]]
    assert tolerance_verdict(1e-4, bad, reference=ReferenceInfo("ladder", True)).status \
        == "unsafe"
    uncertified = tolerance_verdict(1e-4, good, reference=ReferenceInfo("dense", False))
    assert uncertified.status == "unresolved"
    for kind in ("dense", "statespace", "kronecker", "operator"):
        assert tolerance_verdict(1e-4, good, reference=ReferenceInfo(kind, True)).safe


def test_solver_failure_is_unsafe_and_unconverged_fit_is_stated():
    good = [[judge_metric("loglik_error", 1e-6, 0.1)]]
    v = tolerance_verdict(1e-2, good, reference=DENSE, failures=["breakdown"])
    assert v.status == "unsafe"
    u = tolerance_verdict(1e-6, good, reference=DENSE, fit_converged=False)
    # what passes at an estimate the fit has not reached is not safe at the MLE
    assert u.status == "unresolved" and UNCONVERGED_REASON in u.reasons
    assert u.to_dict()["fit_converged"] is False


def test_recommendation_rule():
    rec = recommend({1e-2: "unsafe", 1e-4: "safe", 1e-6: "safe", 1e-8: "safe"})
    assert rec.tol == 1e-4 and rec.monotone
    # An unresolved tighter tolerance blocks every looser one.
    assert recommend({1e-2: "safe", 1e-4: "unresolved", 1e-6: "safe"}).tol == 1e-6
    # Non-monotone: 1e-2 safe above an unsafe 1e-4; reported, not recommended.
    rec = recommend({1e-2: "safe", 1e-4: "unsafe", 1e-6: "safe"})
    assert rec.tol == 1e-6 and not rec.monotone and rec.non_monotone == (1e-2,)
    assert "non-monotone" in rec.reason
    none = recommend({1e-4: "failed", 1e-6: "unsafe"})
    assert none.tol is None and "1e-06" in none.reason
    assert recommend({}).tol is None


def test_spread_of_nothing_is_nan():
    assert math.isnan(spread("m", []).median)
    assert math.isnan(spread("m", [1.0, math.nan]).maximum)


def test_solver_seed_is_the_seed_sequence_spawn():
    # Source: numpy SeedSequence spawning (numpy "Parallel random number generation").
    expected = int(np.random.SeedSequence(7, spawn_key=(SOLVER_KEY, 2))
                   .generate_state(2, dtype=np.uint64)[0] >> np.uint64(1))
    assert solver_seed(7, 2) == expected
    seeds = solver_seeds(7, 3)
    assert len(set(seeds)) == 3 and seeds[0] == solver_seed(7, 0)
    assert all(0 <= s < 2 ** 63 for s in seeds)
    with pytest.raises(SolverSeedError, match="seed index"):
        solver_seed(0, -1)
    with pytest.raises(SolverSeedError, match="--solver-seeds"):
        solver_seeds(0, 0)


def test_seed_reaches_only_a_declared_option():
    def with_rng(points, kernel, theta, *, tol, rng=None):
        return None

    def with_seed(points, kernel, theta, *, tol, seed=0):
        return None

    def catch_all(points, kernel, theta, *, tol, **options):
        return None

    assert seed_option(with_rng) == "rng" and seed_option(with_seed) == "seed"
    assert seed_option(catch_all) is None
    assert seeded_options(with_rng, {"leaf_size": 8}, 5) == {"leaf_size": 8, "rng": 5}
    assert seeded_options(with_rng, {"rng": 1}, 5) == {"rng": 1}
    assert seeded_options(catch_all, {}, 5) == {}


def test_ladder_factor_is_one_setting():
    assert Task.__dataclass_fields__["ladder_factor"].default == LADDER_FACTOR


def _raising_factory(error: type[Exception]):
    def factorize(points, kernel, theta, *, tol=None):
        raise error("raised on purpose")
    return factorize


@pytest.mark.parametrize(("error", "status"), [(ValueError, "solver failed"),
                                               (np.linalg.LinAlgError, "unsafe")])
def test_an_in_process_solver_error_is_classified_as_in_a_child(error, status):
    # Without isolation (built-in solvers) an exception is classified exactly as
    # ``harness.audit.solver_calls.guarded`` does in a child: a numerical breakdown
    # (LinAlgError) makes the knob value unsafe, anything else is a failed solver, never
    # "unsafe" (exit code 3, not 1).
    from small_audit import audit_one_value

    from harness.solvers.registry import ResolvedSolver

    solver = ResolvedSolver(name="broken", version=None, factory=_raising_factory(error),
                            origin="builtin")
    audit = audit_one_value(solver)
    assert audit.verdict.status == status
    assert "raised on purpose" in audit.verdict.failures[0]
