"""Time to accuracy (harness.analysis.time_to_accuracy) on planted results tables.

Each table is written by hand, so the knob value that must be chosen at every point, its
time and the exponent of the fit are known before the analysis runs.
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from harness.analysis.load import RunData
from harness.analysis.time_to_accuracy import (
    TimeToAccuracyError,
    default_limit,
    knob_text,
    time_to_accuracy,
)
from harness.audit.metric_names import LOGLIK_ERR_NAT, PARAM_SHIFT_SE
from harness.audit.rule import Thresholds
from harness.grid.store.columns import TIMING_COLUMNS
from harness.report.time_to_accuracy_figure import time_to_accuracy_figure
from harness.report.time_to_accuracy_tables import fits_table, points_table

LIMIT = 0.1


def _task(solver: str, knob: str, value: float, n: int, seed: int, error: float,
          seconds: float, status: str = "ok", kernel: str = "matern32") -> dict:
    key = f"{solver}-{value:g}-{n}-{seed}-{kernel}"
    return {"key": key, "case": "planted", "solver": solver, "knob_name": knob,
            "knob_value": value, "tol": value if knob == "tol" else math.nan, "n": n,
            "d": 2, "seed": seed, "status": status, "kernel": kernel, "shape": "",
            "geometry": "uniform", "mean": "constant", "variance": 1.0,
            "lengthscale": "0.2", "nugget": 1e-3,
            LOGLIK_ERR_NAT: error if status == "ok" else math.nan,
            "t_total": seconds if status == "ok" else math.nan}


def _run(tasks: list[dict], timings: pd.DataFrame | None = None) -> RunData:
    empty = pd.DataFrame({c: pd.Series(dtype=float if c in ("repeat", "seconds") else str)
                          for c in TIMING_COLUMNS})
    return RunData(path=Path("planted"), results=pd.DataFrame(tasks),
                   timings=empty if timings is None else timings, meta={})


def _one(result, solver: str):
    found = [s for s in result.series if s.solver == solver]
    assert len(found) == 1, [s.solver for s in result.series]
    return found[0]


def test_the_cheapest_knob_value_meeting_the_limit_is_chosen():
    # planted: at n = 400, tol 1e-2 is fastest but misses; 1e-4 meets and is cheaper
    # than 1e-6, which also meets; so 1e-4 and its 0.5 s (by construction)
    tasks = [_task("hodlr", "tol", 1e-2, 400, 0, error=0.5, seconds=0.2),
             _task("hodlr", "tol", 1e-4, 400, 0, error=0.05, seconds=0.5),
             _task("hodlr", "tol", 1e-6, 400, 0, error=1e-4, seconds=0.9)]
    point = _one(time_to_accuracy(_run(tasks), limit=LIMIT), "hodlr").points[0]
    assert point.reached and point.knob_values == (1e-4,)
    assert point.seconds == 0.5


def test_an_error_exactly_at_the_limit_meets_it():
    # "meets" is |error| <= limit (DEVELOPERS.md, "Time to accuracy"); the sign of the
    # error does not matter (the log-likelihood error may be negative)
    tasks = [_task("hodlr", "tol", 1e-4, 400, 0, error=-LIMIT, seconds=0.5)]
    assert _one(time_to_accuracy(_run(tasks), limit=LIMIT), "hodlr").points[0].reached


def test_the_time_is_the_median_over_seeds_of_each_seeds_cheapest():
    # planted: seeds 0, 1, 2 choose times 1, 2 and 10 (seed 2's cheaper value misses);
    # median of (1, 2, 10) = 2 (numpy.median)
    tasks = [_task("vecchia", "neighbours", 10, 800, 0, error=0.01, seconds=1.0),
             _task("vecchia", "neighbours", 40, 800, 0, error=0.001, seconds=3.0),
             _task("vecchia", "neighbours", 10, 800, 1, error=0.02, seconds=2.0),
             _task("vecchia", "neighbours", 40, 800, 1, error=0.002, seconds=4.0),
             _task("vecchia", "neighbours", 10, 800, 2, error=0.3, seconds=0.5),
             _task("vecchia", "neighbours", 40, 800, 2, error=0.003, seconds=10.0)]
    point = _one(time_to_accuracy(_run(tasks), limit=LIMIT), "vecchia").points[0]
    assert point.seconds == float(np.median([1.0, 2.0, 10.0])) == 2.0
    assert point.knob_values == (10.0, 10.0, 40.0)
    assert (point.seeds, point.seeds_reached) == (3, 3)
    assert "neighbours = 10 (2 of 3 seeds), neighbours = 40 (1 of 3 seeds)" in set(
        points_table(time_to_accuracy(_run(tasks), limit=LIMIT))["knob value"])


def test_a_size_whose_every_knob_value_misses_is_kept_as_not_reached():
    tasks = [_task("vecchia", "neighbours", v, n, 0, error=err, seconds=0.1 * v)
             for n, errs in ((200, (0.2, 0.04)), (400, (1.8, 0.03)), (800, (8.8, 0.22)))
             for v, err in zip((10, 40), errs, strict=True)]
    series = _one(time_to_accuracy(_run(tasks), limit=LIMIT), "vecchia")
    assert [p.n for p in series.points] == [200, 400, 800]      # nothing dropped
    assert series.not_reached == (800,)
    last = series.points[-1]
    assert math.isnan(last.seconds) and last.knob_values == ()
    assert last.reason == "no knob value met the limit at n = 800"
    table = points_table(time_to_accuracy(_run(tasks), limit=LIMIT))
    row = table[table["n"] == "800"].iloc[0]
    assert (row["knob value"], row["time (s)"]) == ("not reached at n = 800", "\u2013")
    # two sizes reached: no fit, and the table of fits says which size was missed
    assert series.fit is None and "reached at 2 size(s) (200, 400)" in series.refused
    fits = fits_table(time_to_accuracy(_run(tasks), limit=LIMIT), level=0.95)
    assert fits.loc[0, "not reached at n"] == "800"


def test_a_size_reached_on_some_seeds_only_is_not_reached():
    tasks = [_task("hodlr", "tol", 1e-4, 400, 0, error=0.05, seconds=0.5),
             _task("hodlr", "tol", 1e-4, 400, 1, error=0.15, seconds=0.5)]
    point = _one(time_to_accuracy(_run(tasks), limit=LIMIT), "hodlr").points[0]
    assert not point.reached and math.isnan(point.seconds)
    assert (point.seeds, point.seeds_reached) == (2, 1)
    assert point.reason == "met the limit at n = 400 on 1 of 2 seeds"


def test_failed_and_skipped_tasks_are_shown_not_reached_with_their_status():
    tasks = [_task("hodlr", "tol", 1e-2, 800, 0, error=0.0, seconds=0.0, status="failed"),
             _task("dense", "tol", math.nan, 800, 0, error=0.0, seconds=0.0,
                   status="skipped")]
    result = time_to_accuracy(_run(tasks), limit=LIMIT)
    assert _one(result, "hodlr").points[0].reason == "no task finished at n = 800 (failed)"
    assert _one(result, "dense").points[0].reason == "no task finished at n = 800 (skipped)"


def test_an_exact_solver_is_its_own_series_without_a_knob():
    tasks = [_task("dense", "tol", math.nan, n, 0, error=0.0, seconds=1e-9 * n ** 3)
             for n in (200, 400, 800)]
    series = _one(time_to_accuracy(_run(tasks), limit=LIMIT), "dense")
    assert all(p.reached for p in series.points)
    assert knob_text(series.knob_name, series.points[0].knob_values[0]) == "exact"
    # t = 1e-9 n^3 exactly: the OLS slope of log t on log n is 3 (closed form)
    assert series.fit is not None and series.fit.slope == pytest.approx(3.0, abs=1e-12)


def test_the_fit_covers_the_reached_sizes_and_recovers_the_planted_exponent():
    # planted: the cheapest meeting value costs 0.01 n^1.5 s; at 1600 nothing meets.
    # OLS of log t on log n through exactly collinear points returns the exponent 1.5
    # (Montgomery, Peck & Vining, sec. 2.2: zero residuals)
    sizes = (100, 200, 400, 800)
    tasks = [_task("hodlr", "tol", 1e-6, n, 0, error=1e-3, seconds=0.01 * n ** 1.5)
             for n in sizes]
    tasks += [_task("hodlr", "tol", 1e-2, n, 0, error=0.5, seconds=1e-4 * n)
              for n in (*sizes, 1600)]
    series = _one(time_to_accuracy(_run(tasks), limit=LIMIT), "hodlr")
    assert series.fit is not None and series.fit.sizes == tuple(float(n) for n in sizes)
    assert series.fit.slope == pytest.approx(1.5, abs=1e-12)
    assert series.not_reached == (1600,)


def test_the_bootstrap_resamples_only_the_chosen_tasks_timings():
    # planted: the chosen tol 1e-4 takes n^1 s (repeats 0.98, 1.0, 1.02 of it); the
    # unchosen tol 1e-2 (it misses) takes n^3 s. Pooling the unchosen repeats would pull
    # the bootstrap interval of the exponent towards 2 or more; the chosen ones alone keep
    # every replicate within 1 +- 0.4 log(1.02/0.98) / log 2: from b = Sxy / Sxx (the OLS
    # slope, Montgomery, Peck & Vining, sec. 2.2) with x = log n at four sizes a factor 2
    # apart (Sxx = 5 log(2)^2) and each y off by a factor in [0.98, 1.02]
    sizes = (100, 200, 400, 800)
    tasks, repeats = [], []
    for n in sizes:
        for value, error, seconds in ((1e-4, 0.01, 1e-3 * n), (1e-2, 0.5, 1e-9 * n ** 3)):
            task = _task("hodlr", "tol", value, n, 0, error=error, seconds=seconds)
            tasks.append(task)
            repeats += [{"key": task["key"], "phase": "total", "repeat": r,
                         "seconds": seconds * f} for r, f in enumerate((0.98, 1.0, 1.02))]
    result = time_to_accuracy(_run(tasks, pd.DataFrame(repeats)), limit=LIMIT,
                              rng=np.random.default_rng(0))
    fit = _one(result, "hodlr").fit
    assert fit is not None and fit.slope == pytest.approx(1.0, abs=1e-12)
    spread = 0.4 * math.log(1.02 / 0.98) / math.log(2)
    assert math.isfinite(fit.boot_low) and math.isfinite(fit.boot_high)
    assert 1 - spread <= fit.boot_low <= 1 <= fit.boot_high <= 1 + spread


def test_series_are_per_dataset_and_labelled_by_what_differs():
    tasks = [_task("hodlr", "tol", 1e-6, 400, 0, error=1e-3, seconds=0.5, kernel=k)
             for k in ("matern32", "matern52")]
    result = time_to_accuracy(_run(tasks), limit=LIMIT)
    assert result.labels() == ("hodlr (matern32)", "hodlr (matern52)")


def test_the_default_limit_is_the_verdicts_limit_on_the_metric():
    # harness.audit.rule.Thresholds: 0.1 nat and 0.1 SE by default
    assert default_limit(LOGLIK_ERR_NAT, Thresholds()) == 0.1
    assert default_limit("loglik_abs_err", Thresholds(loglik_nats=0.5)) == 0.5
    assert default_limit(PARAM_SHIFT_SE, Thresholds(param_shift_se=0.3)) == 0.3
    with pytest.raises(TimeToAccuracyError, match="no limit on metric 'kl_nat'"):
        default_limit("kl_nat", Thresholds())


@pytest.mark.parametrize("limit", [0.0, -1.0, math.nan, math.inf])
def test_a_limit_that_is_not_a_positive_number_is_refused(limit):
    tasks = [_task("hodlr", "tol", 1e-4, 400, 0, error=0.05, seconds=0.5)]
    with pytest.raises(TimeToAccuracyError, match="the limit must be a positive number"):
        time_to_accuracy(_run(tasks), limit=limit)


def test_a_missing_column_is_named():
    tasks = [_task("hodlr", "tol", 1e-4, 400, 0, error=0.05, seconds=0.5)]
    with pytest.raises(TimeToAccuracyError, match="no column 't_nothing' \\(the cost\\)"):
        time_to_accuracy(_run(tasks), limit=LIMIT, cost="t_nothing")


def test_a_run_where_nothing_is_reached_draws_no_figure_but_lists_every_point():
    tasks = [_task("hodlr", "tol", 1e-2, n, 0, error=0.5, seconds=0.1) for n in (200, 400)]
    result = time_to_accuracy(_run(tasks), limit=LIMIT)
    assert time_to_accuracy_figure(result) is None
    assert list(points_table(result)["knob value"]) == ["not reached at n = 200",
                                                       "not reached at n = 400"]
