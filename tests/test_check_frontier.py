"""Several solvers in one check: the frontier, the pick across solvers, ties and refusals.

The pick's rule (``harness.check.frontier``): within a solver the loosest safe knob value
with no unsafe or unresolved tighter one; across solvers the fastest pick; the two
fastest tied when the two-sided Mann-Whitney U test (Mann and Whitney 1947) cannot tell
their timing repeats apart at alpha = 0.05. Timings come from an injected stopwatch
(``ScriptedStopwatch``), so the answer is known exactly.
"""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scipy.special import comb

from harness.check import CheckOptions, run_check, validate
from harness.check.frontier import (
    SolverPick,
    limit_ratio,
    nondominated,
    recommend_across,
    tie_p_value,
)
from harness.check.solver_timing import ScriptedStopwatch, time_fit_evaluations
from harness.cli import main
from harness.infra.data_files import load_observations
from harness.infra.exit_codes import ExitCode
from harness.model.kernels import make_kernel
from harness.solvers.registry import resolve_solver

ROOT = Path(__file__).resolve().parents[1]
EXAMPLE = ROOT / "examples" / "jittered_solver"
N = 150
FIXED = {"variance": 0.5, "lengthscale": 3.0, "nugget": 0.09}


# --- the rule, on numbers ------------------------------------------------------------

def test_complete_separation_of_five_against_five_has_the_exact_p_value():
    # Two-sided exact Mann-Whitney p of two completely separated samples of 5 and 5:
    # 2 / C(10, 5) = 2/252 (Mann and Whitney 1947, Ann. Math. Stat. 18, Table I: the
    # extreme U = 0 has probability 1/C(10, 5) on one side).
    p = tie_p_value([1.0, 1.1, 1.2, 1.3, 1.4], [2.0, 2.1, 2.2, 2.3, 2.4])
    assert p == pytest.approx(2.0 / comb(10, 5))
    assert p < 0.05


def test_three_repeats_each_can_never_be_told_apart():
    # The smallest two-sided exact p of 3 against 3 is 2 / C(6, 3) = 0.1 > 0.05.
    p = tie_p_value([1.0, 1.1, 1.2], [5.0, 5.1, 5.2])
    assert p == pytest.approx(2.0 / comb(6, 3))


def test_identical_timings_tie_and_both_are_named():
    a = SolverPick("hodlr", "tol", 1e-6, (1.0,) * 5)
    b = SolverPick("vecchia", "neighbours", 40.0, (1.0,) * 5)
    pick = recommend_across([a, b], exact_seconds=10.0, exact="dense", timing_repeats=5)
    assert pick.recommended is not None and pick.tied_with
    named = {pick.recommended.solver, pick.tied_with[0][0].solver}
    assert named == {"hodlr", "vecchia"}
    assert pick.tied_with[0][1] == 1.0
    assert "not distinguishable" in pick.statement
    assert pick.speedup_over_exact == pytest.approx(10.0)


def test_separated_timings_name_one_solver_and_the_speedups():
    fast = SolverPick("vecchia", "neighbours", 40.0, (1.0, 1.01, 0.99, 1.02, 0.98))
    slow = SolverPick("hodlr", "tol", 1e-6, (3.0, 3.1, 2.9, 3.05, 2.95))
    none = SolverPick("plug", "tol", None, (), reason="no tolerance qualifies")
    pick = recommend_across([slow, none, fast], exact_seconds=6.0, exact="dense",
                            timing_repeats=5)
    assert pick.recommended == fast and not pick.tied_with
    assert pick.speedup_over_exact == pytest.approx(6.0)
    assert pick.speedup_over_solvers == {"hodlr": pytest.approx(3.0)}
    assert [p.solver for p in pick.no_safe] == ["plug"]
    assert "plug has no safe setting: no tolerance qualifies" in pick.statement


def test_no_safe_solver_at_all_recommends_nothing():
    pick = recommend_across([SolverPick("a", "tol", None, reason="r")], exact_seconds=None,
                            exact="dense", timing_repeats=5)
    assert pick.recommended is None and "no solver has a safe setting" in pick.statement


def test_nondominated_marks_by_hand():
    # (seconds, error as a fraction of its limit): (2, 0.5) is dominated by (1, 0.4);
    # (3, 0.01) is the most accurate; a point without a time is never marked.
    points = [(1.0, 0.4), (2.0, 0.5), (3.0, 0.01), (math.nan, 0.0), (0.5, 5.0)]
    assert nondominated(points) == [True, False, True, False, True]


def test_limit_ratio_takes_the_worst_limited_metric_and_refuses_nan():
    metrics = {"loglik_error": {"value": 0.05, "threshold": 0.1},
               "param_shift_se": {"value": -0.3, "threshold": 0.2},
               "mloe": {"value": 9.0, "threshold": None}}
    assert limit_ratio(metrics) == pytest.approx(1.5)
    metrics["kriging_mean_sd"] = {"value": None, "threshold": 0.05}
    assert limit_ratio(metrics) == math.inf
    assert math.isnan(limit_ratio({}))


def test_a_value_that_breaks_down_when_timed_gets_no_time_and_the_others_are_timed():
    # HODLR at tol 0.5 loses positive definiteness on this smooth, nearly noise-free
    # field (a CompressionBreakdownError, a LinAlgError); before, the breakdown escaped
    # the timing stage and ended a whole check after its audits (found on 26,633 points)
    rng = np.random.default_rng(0)
    points, y = rng.random((600, 2)), rng.standard_normal(600)
    kernel = make_kernel("matern52", {"variance": 1.0, "lengthscale": 0.5, "nugget": 1e-6})
    broken, fine = time_fit_evaluations(points, y, kernel, mean="constant",
                                        solver=resolve_solver("hodlr"), label="hodlr",
                                        values=(0.5, 1e-8), options={"leaf_size": 64},
                                        base_seed=0, repeats=2)
    assert broken.repeats == () and math.isnan(broken.seconds)
    assert broken.to_dict()["seconds"] is None
    assert len(fine.repeats) == 2 and math.isfinite(fine.seconds)


# --- end to end ----------------------------------------------------------------------

@pytest.fixture(scope="module")
def smooth_csv(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """A smooth field plus noise on 150 scattered points."""
    root = tmp_path_factory.mktemp("frontier")
    rng = np.random.default_rng(3)
    e, n = rng.uniform(0, 10, N), rng.uniform(0, 10, N)
    pd.DataFrame({"e": e, "n": n, "z": np.sin(e / 2) + np.cos(n / 3)
                  + 0.3 * rng.normal(size=N)}).to_csv(root / "smooth.csv", index=False)
    return root / "smooth.csv"


@pytest.fixture(scope="module")
def three_solvers(smooth_csv: Path, tmp_path_factory: pytest.TempPathFactory):
    """hodlr, vecchia and the example plugin on the same data, with known answers:
    vecchia conditioning on every earlier point is exact (safe), hodlr at tol 1e-10 is
    safe, the plugin's jitter of 0.1 variances is unsafe; the scripted stopwatch makes
    the plugin fastest (0.5 s), then vecchia (1 s), then hodlr (2 s)."""
    mp = pytest.MonkeyPatch()
    mp.syspath_prepend(str(EXAMPLE))
    try:
        data = validate(load_observations(smooth_csv, coords=["e", "n"], value="z"))
        options = CheckOptions(fixed_params=FIXED, solver_seeds=1, refit=False,
                               solvers=("hodlr", "vecchia", "jittered_solver:factorize"),
                               sweeps={"hodlr": (1e-10,), "vecchia": (float(N - 1),),
                                       "jittered_solver:factorize": (0.1,)})
        watch = ScriptedStopwatch({"jittered_solver:factorize": 0.5, "vecchia": 1.0,
                                   "hodlr": 2.0, "exact": 8.0}, run_calls=False)
        result = run_check(data, options, source=str(smooth_csv), stopwatch=watch)
    finally:
        mp.undo()
    return result


def test_known_fastest_safe_solver_is_recommended(three_solvers):
    result = three_solvers
    frontier = result.frontier
    assert frontier["recommended"] == {"solver": "vecchia", "knob_name": "neighbours",
                                       "value": float(N - 1), "seconds": 1.0}
    # the single-solver keys describe the recommended solver (existing scripts)
    assert result.solver["name"] == "vecchia"
    assert result.recommended_knob == {"solver": "vecchia", "name": "neighbours",
                                       "value": float(N - 1)}
    assert result.recommended_tolerance is None
    assert frontier["speedup_over_exact"] == pytest.approx(8.0)
    assert frontier["speedup_over_solvers"] == {"hodlr": pytest.approx(2.0)}
    assert frontier["timing_repeats"] == 5  # the default below 65,536 points
    # five scripted repeats each, completely separated: not a tie (p = 2/252)
    assert frontier["tied_with"] == []
    times = {e["given"]: [p["time"]["repeats"] for p in e["points"]]
             for e in result.solvers}
    assert times["hodlr"] == [[2.0] * 5] and times["vecchia"] == [[1.0] * 5]


def test_solver_with_no_safe_setting_is_named_and_passed_over(three_solvers):
    frontier = three_solvers.frontier
    named = {entry["solver"]: entry["reason"] for entry in frontier["no_safe"]}
    assert list(named) == ["jittered_solver:factorize"]
    assert "no tolerance qualifies" in named["jittered_solver:factorize"]
    plugin = next(e for e in three_solvers.solvers if e["given"].startswith("jittered"))
    assert plugin["status"] == "audited" and plugin["pick"] is None
    assert [p["status"] for p in plugin["points"]] == ["unsafe"]


def test_every_solver_is_audited_on_the_same_fit_reference_and_holdout(three_solvers):
    assert [e["given"] for e in three_solvers.solvers] == [
        "hodlr", "vecchia", "jittered_solver:factorize"]
    for entry in three_solvers.solvers:
        for point in entry["points"]:
            assert point["reference"] == "dense"
    assert three_solvers.n_holdout == 15


def test_the_frontier_marks_the_fast_exact_point(three_solvers):
    vecchia = next(e for e in three_solvers.solvers if e["given"] == "vecchia")
    hodlr = next(e for e in three_solvers.solvers if e["given"] == "hodlr")
    # vecchia (1 s) and hodlr (2 s) are both near exact: hodlr is dominated unless it
    # is strictly more accurate, which at tol 1e-10 against full conditioning it may be;
    # the plugin (0.5 s, unsafe) is the fastest point and so non-dominated
    plugin = next(e for e in three_solvers.solvers if e["given"].startswith("jittered"))
    assert plugin["points"][0]["nondominated"] is True
    assert vecchia["points"][0]["nondominated"] is True
    a = limit_ratio(hodlr["points"][0])
    b = limit_ratio(vecchia["points"][0])
    assert hodlr["points"][0]["nondominated"] is (a < b)


def test_tied_solvers_are_both_named(smooth_csv):
    data = validate(load_observations(smooth_csv, coords=["e", "n"], value="z"))
    options = CheckOptions(fixed_params=FIXED, solver_seeds=1, refit=False,
                           solvers=("hodlr", "vecchia"),
                           sweeps={"hodlr": (1e-10,), "vecchia": (float(N - 1),)})
    watch = ScriptedStopwatch({"hodlr": 1.0, "vecchia": 1.0}, run_calls=False)
    result = run_check(data, options, source=str(smooth_csv), stopwatch=watch)
    frontier = result.frontier
    assert frontier["recommended"]["solver"] in ("hodlr", "vecchia")
    assert len(frontier["tied_with"]) == 1
    tied = frontier["tied_with"][0]
    assert {tied["solver"], frontier["recommended"]["solver"]} == {"hodlr", "vecchia"}
    assert tied["p_value"] == 1.0
    assert "so both are named" in frontier["statement"]


# --- the command line ----------------------------------------------------------------

def test_bad_solvers_are_refused_alone_and_the_others_written(smooth_csv, tmp_path, capsys):
    out = tmp_path / "out"
    code = main(["check", str(smooth_csv), "--coords", "e,n", "--value", "z",
                 "--fixed-params", "variance=0.5", "lengthscale=3", "nugget=0.09",
                 "--solver", "hodlr", "--solver", "nosuch_module:f", "--solver", "hodlr",
                 "--solver", "vecchia", "--sweep", "hodlr=1e-10",
                 "--sweep", "vecchia=0.5", "--sweep", "other=1", "--solver-seeds", "1",
                 "--no-refit", "--timing-repeats", "1", "--out", str(out)])
    err = capsys.readouterr().err
    assert code == ExitCode.ERROR
    assert "--solver 'nosuch_module:f'" in err and "not found" in err
    assert "--solver 'hodlr' is listed twice" in err
    assert "--sweep other=1: solver 'other' is not listed" in err
    assert "--sweep vecchia=: expected neighbours" in err
    saved = json.loads((out / "check.json").read_text())
    statuses = {(e["given"], e["status"]) for e in saved["solvers"]}
    assert ("hodlr", "audited") in statuses
    assert {s for g, s in statuses if g != "hodlr" or s == "refused"} == {"refused"}
    hodlr = next(e for e in saved["solvers"] if e["status"] == "audited")
    assert hodlr["points"][0]["status"] == "safe"
    assert saved["recommended_tolerance"] == 1e-10


def test_knob_values_with_several_solvers_is_refused_before_any_work(smooth_csv, tmp_path,
                                                                      capsys):
    code = main(["check", str(smooth_csv), "--coords", "e,n", "--value", "z",
                 "--solver", "hodlr", "--solver", "vecchia", "--knob-values", "10",
                 "--out", str(tmp_path / "o")])
    assert code == ExitCode.ERROR
    assert "--knob-values: allowed with a single --solver" in capsys.readouterr().err
    assert not (tmp_path / "o").exists()


def test_a_failed_solver_gives_exit_3_and_the_other_pick_is_still_reported(
        smooth_csv, tmp_path, capsys, monkeypatch):
    # a plugin that passes its 64-point trial, then crashes on all 150 points
    (tmp_path / "crashing_plugin.py").write_text(
        "import os, signal\n"
        "from harness.solvers.dense_solver import factorize as dense\n"
        "def factorize(points, kernel, theta, *, tol):\n"
        "    if points.shape[0] > 100:\n"
        "        os.kill(os.getpid(), signal.SIGSEGV)\n"
        "    return dense(points, kernel, theta, tol=tol)\n", encoding="utf-8")
    monkeypatch.syspath_prepend(str(tmp_path))
    out = tmp_path / "out"
    code = main(["check", str(smooth_csv), "--coords", "e,n", "--value", "z",
                 "--fixed-params", "variance=0.5", "lengthscale=3", "nugget=0.09",
                 "--solver", "hodlr", "--solver", "crashing_plugin:factorize",
                 "--sweep", "hodlr=1e-10", "--tolerances", "1e-6", "--solver-seeds", "1",
                 "--no-refit", "--timing-repeats", "1", "--out", str(out), "--json"])
    captured = capsys.readouterr()
    assert code == ExitCode.SOLVER_FAILED
    assert "solver failed" in captured.err and "SIGSEGV" in captured.err
    saved = json.loads(captured.out)
    assert saved["frontier"]["recommended"]["solver"] == "hodlr"
    assert saved["recommended_tolerance"] == 1e-10
    plugin = next(e for e in saved["solvers"] if e["given"] == "crashing_plugin:factorize")
    assert plugin["status"] == "solver failed"
    assert plugin["points"][0]["status"] == "solver failed"


def test_tolerances_outside_a_plugins_declared_range_are_refused(smooth_csv, tmp_path,
                                                                 capsys, monkeypatch):
    # the example plugin declares tol in (0, 0.1] (examples/jittered_solver)
    monkeypatch.syspath_prepend(str(EXAMPLE))
    code = main(["check", str(smooth_csv), "--coords", "e,n", "--value", "z",
                 "--solver", "jittered_solver:factorize", "--tolerances", "1e-3,0.5",
                 "--out", str(tmp_path / "o")])
    assert code == ExitCode.ERROR
    err = capsys.readouterr().err
    assert "--tolerances: expected tol as a number in (0, 0.1], got 0.5" in err
    assert not (tmp_path / "o").exists()
