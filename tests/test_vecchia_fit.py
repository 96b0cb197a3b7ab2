"""The fit at scale (Vecchia pilot + exact-score refinement), its Newton-decrement stop,
and a fit plan that reads n and the memory budget, never a clock."""

from __future__ import annotations

import math
import time

import numpy as np
import pytest

from harness.check import CheckOptions, run_check, validate
from harness.check.datafile import observations_from_arrays
from harness.check.fisher_steps import DECREMENT_TOL_NAT, fisher_scoring
from harness.check.fit_engines import EngineEvaluation
from harness.check.fit_plan import DENSE_FIT_MAX_N, plan_fit
from harness.check.fitting import data_scale, default_bounds, default_starts, fit_dense
from harness.check.vecchia_fit import REFINE_TOL_SE, fit_at_scale
from harness.linalg import dense_budget
from harness.model.kernels import make_kernel
from harness.references import DenseCholesky, dense_evaluate

GiB = 2 ** 30


class QuadraticEngine:
    """L(theta) = -1/2 (theta - m)' A (theta - m), score A (m - theta), with the metric
    ``metric_scale`` * A as its Fisher information (a closed form)."""

    name = "quadratic"

    def __init__(self, a: np.ndarray, m: np.ndarray, metric_scale: float) -> None:
        self.a, self.m, self.metric_scale = a, m, metric_scale
        self.calls = 0

    def __call__(self, theta: np.ndarray, *, fisher: bool = False) -> EngineEvaluation:
        self.calls += 1
        d = theta - self.m
        return EngineEvaluation(loglik=-0.5 * float(d @ self.a @ d), score=-self.a @ d,
                                fisher=self.metric_scale * self.a if fisher else None,
                                seconds=0.0)


A = np.array([[4.0, 1.0, 0.5], [1.0, 3.0, 0.2], [0.5, 0.2, 2.0]])
OPTIMUM = np.array([0.3, -0.2, 0.1])
WIDE = [(-10.0, 10.0)] * 3
TEMPLATE = make_kernel("matern32", {"lengthscale": 1.0, "nugget": 1.0})


def test_newton_decrement_is_the_gap_of_a_quadratic_and_one_exact_step_ends_it():
    # Source: Boyd and Vandenberghe 2004, sec. 9.5.1: for a quadratic with the exact
    # Hessian, lambda^2 / 2 equals f(x) - p*, and the Newton step reaches the optimum.
    engine = QuadraticEngine(A, OPTIMUM, metric_scale=1.0)
    start = OPTIMUM + np.array([0.5, 0.4, -0.3])
    gap = 0.5 * float((start - OPTIMUM) @ A @ (start - OPTIMUM))
    first = fisher_scoring(engine, TEMPLATE, start, bounds=WIDE, max_steps=0,
                           decrement_tol=DECREMENT_TOL_NAT)
    assert first.decrement == pytest.approx(gap, rel=1e-12)
    assert not first.converged and first.accepted_steps == 0
    fit = fisher_scoring(engine, TEMPLATE, start, bounds=WIDE,
                         decrement_tol=DECREMENT_TOL_NAT)
    assert fit.converged and fit.accepted_steps == 1
    assert fit.decrement == pytest.approx(0.0, abs=1e-20)
    np.testing.assert_allclose(fit.theta, OPTIMUM, atol=1e-12)


def test_newton_decrement_stops_a_slow_iteration_at_the_predicted_step():
    # Source: closed form. With the metric 2A the step halves the distance d_k to the
    # optimum, d_k = d_0 / 2^k, and lambda_k^2 / 2 = g' (2A)^-1 g / 2 = d_0' A d_0 / 4^(k+1);
    # the first k with that <= the threshold is where the iteration must stop.
    engine = QuadraticEngine(A, OPTIMUM, metric_scale=2.0)
    d0 = np.array([1.0, -0.8, 0.6])
    q = float(d0 @ A @ d0)
    expected = next(k for k in range(60) if q / 4 ** (k + 1) <= DECREMENT_TOL_NAT)
    fit = fisher_scoring(engine, TEMPLATE, OPTIMUM + d0, bounds=WIDE, max_steps=50,
                         decrement_tol=DECREMENT_TOL_NAT)
    assert fit.converged and fit.accepted_steps == expected
    assert fit.decrement <= DECREMENT_TOL_NAT < q / 4 ** expected


def test_newton_decrement_counts_only_the_free_parameters_at_a_bound():
    # Source: projected Newton step (Bertsekas 1982): a parameter on its bound whose step
    # points outward is held, and the decrement is taken over the free ones.
    engine = QuadraticEngine(A, OPTIMUM, metric_scale=1.0)
    bounds = [(-10.0, 10.0), (0.0, 10.0), (-10.0, 10.0)]     # the optimum's -0.2 is outside
    fit = fisher_scoring(engine, TEMPLATE, np.array([1.0, 1.0, 1.0]), bounds=bounds,
                         decrement_tol=DECREMENT_TOL_NAT)
    assert fit.converged
    assert fit.theta[1] == 0.0 and fit.bounds_hit
    assert 0.0 <= fit.decrement <= DECREMENT_TOL_NAT


# -- the plan ---------------------------------------------------------------------------
def _no_clock(*_args, **_kwargs):
    raise AssertionError("the fit plan read a clock")


def test_plan_reads_n_and_the_budget_never_a_clock(monkeypatch):
    # Source: the plan's rule (harness.check.fit_plan docstring); the clocks raise.
    monkeypatch.setattr(time, "perf_counter", _no_clock)
    monkeypatch.setattr(time, "monotonic", _no_clock)
    monkeypatch.setattr(time, "time", _no_clock)
    big = 64 * GiB
    kw = {"family": "matern32", "time_budget": 600.0}
    assert plan_fit(DENSE_FIT_MAX_N, 4, memory_budget=big, **kw).engine == "dense"
    over = plan_fit(DENSE_FIT_MAX_N + 1, 4, memory_budget=big, **kw)
    assert over.engine == "vecchia" and over.exact_score_fits
    small = plan_fit(2000, 4, memory_budget=40 * 2 ** 20, **kw)
    assert small.engine == "vecchia" and "memory budget" in small.reason
    assert not plan_fit(5000, 4, memory_budget=40 * 2 ** 20, **kw).exact_score_fits
    assert plan_fit(100, 4, memory_budget=big, dense_max_n=0, **kw).engine == "vecchia"
    other = plan_fit(DENSE_FIT_MAX_N + 1, 4, memory_budget=big, family="matern",
                     time_budget=600.0)
    assert other.engine == "compressed" and "no compiled form" in other.reason
    # the default budget (None) is a share of total memory: no clock either
    assert plan_fit(100, 4, memory_budget=None, **kw).engine == "dense"


def test_default_budget_is_a_share_of_total_memory_not_of_what_is_free(monkeypatch):
    # Source: the rule of harness.linalg.dense_budget (DEFAULT_BUDGET_FRACTION of total).
    class Memory:
        def __init__(self, available: int) -> None:
            self.total, self.available = 32 * GiB, available

    dense_budget.total_memory.cache_clear()
    monkeypatch.setattr(dense_budget.psutil, "virtual_memory", lambda: Memory(30 * GiB))
    first = dense_budget.default_memory_budget()
    monkeypatch.setattr(dense_budget.psutil, "virtual_memory", lambda: Memory(1 * GiB))
    assert dense_budget.default_memory_budget() == first
    dense_budget.total_memory.cache_clear()
    assert dense_budget.default_memory_budget() == int(0.6 * 32 * GiB)
    dense_budget.total_memory.cache_clear()


# -- the at-scale fit against the dense MLE ---------------------------------------------
TRUTH = {"variance": 1.3, "lengthscale": 0.15, "nugget": 0.05}


def _field(n: int, seed: int) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    x = rng.uniform(0.0, 1.0, (n, 2))
    y = 2.0 + DenseCholesky(x, make_kernel("matern32", TRUTH)).apply_sqrt(
        rng.standard_normal(n))
    return x, y


def _at_scale_against_dense(n: int, seed: int) -> tuple[float, float, object]:
    x, y = _field(n, seed)
    scale = data_scale(x, y, mean="constant")
    bounds = default_bounds(TEMPLATE, scale)
    pilot = np.sort(np.random.default_rng(seed + 1000).choice(n, 500, replace=False))
    fit = fit_at_scale(x, y, TEMPLATE, mean="constant",
                       starts=default_starts(TEMPLATE, scale), bounds=bounds,
                       pilot_index=pilot, exact_score=True)
    # The dense MLE from the data-generating parameters (independent of the fit above).
    dense = fit_dense(x, y, TEMPLATE, mean="constant",
                      starts=[make_kernel("matern32", TRUTH).theta], bounds=bounds)
    assert dense.converged
    exact_at_fit = dense_evaluate(x, y, fit.kernel, mean="constant", score=False).loglik
    se = np.sqrt(np.diag(np.linalg.inv(np.asarray(dense.fisher))))
    return (abs(exact_at_fit - dense.loglik),
            float(np.max(np.abs(fit.theta - dense.theta) / se)), fit)


@pytest.mark.parametrize("seed", [1, *(pytest.param(s, marks=pytest.mark.slow)
                                       for s in (2, 3, 4, 5))])
def test_at_scale_fit_is_the_dense_mle(seed):
    # Source: harness's dense fit (fit_dense, itself checked against scikit-learn in
    # test_fitting.py and an independent scipy MLE in test_fit_accuracy.py). Acceptance
    # limits (covaudit's choice): within 0.01 nat and 0.05 SE of it, on every seed; the
    # default run takes one seed, the slow set the other four (each seed is a dense fit
    # at n = 1,500).
    gap, shift, fit = _at_scale_against_dense(1500, seed)
    assert fit.converged and fit.engine == "vecchia"
    assert [s.name for s in fit.stages] == ["vecchia pilot", "exact refinement"]
    assert fit.stages[1].statistic <= REFINE_TOL_SE and fit.stages[1].steps <= 2
    assert fit.loglik_gap_nat() >= -1e-8            # refinement never lowers exact L
    assert gap <= 0.01 and shift <= 0.05, (gap, shift)


@pytest.mark.slow
def test_at_scale_fit_is_the_dense_mle_at_4000_points():
    # Source: as above, at a size where the dense fit takes minutes.
    gap, shift, fit = _at_scale_against_dense(4000, 6)
    assert fit.converged and gap <= 0.01 and shift <= 0.05, (gap, shift)


def test_time_budget_stops_the_fit_unconverged():
    # Source: the fit stage's cap (harness.check.vecchia_fit): past it, no convergence.
    x, y = _field(600, 9)
    scale = data_scale(x, y, mean="constant")
    fit = fit_at_scale(x, y, TEMPLATE, mean="constant", starts=default_starts(TEMPLATE, scale),
                       bounds=default_bounds(TEMPLATE, scale), pilot_index=np.arange(300),
                       exact_score=True, time_budget=1e-9)
    assert not fit.converged
    assert "time budget" in fit.refinement and "time budget" in "; ".join(fit.notes)
    assert math.isnan(fit.loglik_gap_nat())


def test_check_records_both_estimates_and_their_gap():
    # Source: the fit record's contract (harness.check.fit_records.MleFit.to_dict).
    x, y = _field(700, 10)
    data = validate(observations_from_arrays(x, y, source="synthetic"))
    options = CheckOptions(kernel="matern32", tolerances=(1e-8,), solver_seeds=1,
                           refit=False, dense_fit_max_n=0, pilot_n=400)
    result = run_check(data, options, source="synthetic")
    fit = result.fit
    assert fit["plan"]["engine"] == "vecchia" and fit["plan"]["exact_score_fits"]
    pilot, refined = fit["stages"]
    assert pilot["name"] == "vecchia pilot" and refined["name"] == "exact refinement"
    assert fit["converged"] is True and result.fit_converged
    assert fit["loglik_gap_nat"] == pytest.approx(refined["exact_loglik"]
                                                  - pilot["exact_loglik"])
    assert fit["loglik_gap_nat"] >= -1e-8
    assert refined["steps"] <= 2 and refined["statistic"] <= REFINE_TOL_SE
    assert result.loglik == pytest.approx(refined["exact_loglik"], abs=1e-6)


@pytest.mark.slow
def test_demo_fit_converges():
    # Source: the demo's own record (check.json's fit): the at-scale fit converges.
    from harness.check.demo_data import TRUE_KERNEL, generate_demo

    demo = generate_demo()
    frame = demo.frame
    data = validate(observations_from_arrays(frame[["easting_m", "northing_m"]].to_numpy(),
                                             frame["vwc"].to_numpy(), source="demo"))
    options = CheckOptions(kernel=TRUE_KERNEL, anisotropic=True, mean="constant",
                           tolerances=(1e-6,), solver_seeds=1, refit=False)
    result = run_check(data, options, source="demo")
    assert result.fit["plan"]["engine"] == "vecchia"
    assert result.fit["converged"] is True and result.fit_converged
    assert not any("did not converge" in w for w in result.warnings)
