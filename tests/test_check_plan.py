"""``covaudit check``'s cost plan (issue 22, item 5): printed before any work, ``--plan-only``
stops there, a plan over the memory budget is refused in one line naming what would make
it fit, the plan is kept in check.json, and its memory model holds against measurements.
"""

from __future__ import annotations

import argparse
import json
import tracemalloc
from dataclasses import replace

import numpy as np
import pandas as pd
import pytest

from harness.audit.audit_references import metric_kinds
from harness.audit.dense_sides import dense_sides
from harness.check import CheckOptions
from harness.check.cost_plan import (
    LINE_FIT_PASSES,
    STATESPACE_REFERENCE_PASSES,
    budget_refusal,
    plan_check,
)
from harness.check.plan_calibration import CALIBRATION_SIZES, rate_solver
from harness.cli import check_command as check_cli
from harness.infra.exit_codes import ExitCode
from harness.model.kernels import make_kernel
from harness.references import DenseCholesky
from harness.solvers.registry import resolve_solver

N = 300
FIXED = ["--fixed-params", "variance=1.0", "lengthscale=2.0", "nugget=0.1"]
STAGE_LINES = ("plan: fit:", "plan: reference:", "plan: audits hodlr:", "plan: timing:",
               "plan: refit:", "plan: report:")


def _run(argv: list[str]) -> int:
    parser = argparse.ArgumentParser()
    sub = parser.add_subparsers(dest="verb")
    check_cli.add_parser(sub)
    return check_cli.run(parser.parse_args(["check", *argv]))


def _points(n: int = N, seed: int = 3) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    x = rng.uniform(0, 10, (n, 2))
    kernel = make_kernel("matern32", {"variance": 1.0, "lengthscale": 2.0, "nugget": 0.1})
    return x, DenseCholesky(x, kernel).apply_sqrt(rng.standard_normal(n))


@pytest.fixture(scope="module")
def data_file(tmp_path_factory: pytest.TempPathFactory):
    x, v = _points()
    path = tmp_path_factory.mktemp("plan") / "field.csv"
    pd.DataFrame({"e": x[:, 0], "n": x[:, 1], "z": v}).to_csv(path, index=False)
    return path


def _args(path, out, *extra: str) -> list[str]:
    return [str(path), "--coords", "e,n", "--value", "z", "--out", str(out), *extra]


def test_plan_only_prints_every_stage_and_writes_nothing(data_file, tmp_path, capsys):
    out = tmp_path / "o"
    code = _run(_args(data_file, out, "--plan-only"))
    printed = capsys.readouterr()
    assert code == ExitCode.OK, printed.err
    lines = printed.out.splitlines()
    for start in STAGE_LINES:
        assert any(line.startswith(start) for line in lines), start
    assert "plan: reference by metric: loglik dense, score dense, kriging dense" in lines
    assert any(line.startswith("plan: peak memory") for line in lines)
    assert any("one dpotrf at n = 8,192" in line for line in lines)
    # neither outputs nor a state folder: nothing was fitted or audited
    assert not out.exists() and not (tmp_path / ".o.check-state").exists()


def test_plan_only_json_is_the_plan(data_file, tmp_path, capsys):
    code = _run(_args(data_file, tmp_path / "o", "--plan-only", "--json", *FIXED))
    printed = capsys.readouterr()
    assert code == ExitCode.OK
    plan = json.loads(printed.out)
    assert [s["stage"] for s in plan["stages"]] == ["fit", "reference", "audits", "timing",
                                                    "refit", "report"]
    assert plan["fit"] is None  # fixed parameters: no fit plan
    assert plan["stages"][2]["audits"] == 5 * 3  # the default ladder x default seeds
    assert printed.err.count("plan: ") >= len(STAGE_LINES)  # the lines go to stderr


def test_plan_only_still_validates_options(data_file, tmp_path, capsys):
    code = _run(_args(data_file, tmp_path / "o", "--plan-only", "--holdout-points",
                      str(N)))
    err = capsys.readouterr().err.strip().splitlines()
    assert code == ExitCode.ERROR
    assert len(err) == 1 and "--holdout-points" in err[0]


def test_over_the_budget_refused_before_any_work_and_the_state_kept(data_file, tmp_path,
                                                                    capsys):
    # 2 MiB: below the dense reference's 2.2 MiB at n = 300 (dense_budget.dense_bytes_needed),
    # so the selector takes the operator, whose two HODLR preconditioners alone need more.
    state = tmp_path / ".o.check-state"
    state.mkdir()
    (state / "fit.pickle").write_bytes(b"saved before")
    code = _run(_args(data_file, tmp_path / "o", "--memory-budget", "0.002", *FIXED))
    printed = capsys.readouterr()
    errors = [line for line in printed.err.splitlines() if "error" in line]
    assert code == ExitCode.ERROR
    assert len(errors) == 1
    assert "exceeds the memory budget" in errors[0] and "--memory-budget" in errors[0]
    assert (state / "fit.pickle").read_bytes() == b"saved before"
    assert not (tmp_path / "o").exists()


def test_a_budget_too_small_for_any_plan_names_only_the_budget(data_file, tmp_path,
                                                               capsys):
    # 1 KiB: less than the data themselves (300 x 3 doubles), whatever the options.
    code = _run(_args(data_file, tmp_path / "o", "--memory-budget", "0.000001",
                      "--plan-only"))
    errors = [line for line in capsys.readouterr().err.splitlines() if "error" in line]
    assert code == ExitCode.ERROR
    assert len(errors) == 1 and "one of" not in errors[0]
    assert "--memory-budget" in errors[0]


def test_the_refusal_names_an_option_that_fits():
    # Many probes make the score's n x p (2k + 1) arrays the peak (cost_plan module
    # docstring); a budget between the two plans' peaks must name the smaller count.
    x, y = _points()
    fixed = {"variance": 1.0, "lengthscale": 2.0, "nugget": 0.1}
    many = CheckOptions(probes=400, fixed_params=fixed, tolerances=(1e-4,))
    plan = plan_check(x, y, many, rng=np.random.default_rng(0))
    fewer = plan_check(x, y, CheckOptions(probes=100, fixed_params=fixed,
                                          tolerances=(1e-4,)),
                       calibration=plan.calibration)
    assert fewer.peak_bytes < plan.peak_bytes
    budget = (plan.peak_bytes + fewer.peak_bytes) // 2
    tight = CheckOptions(probes=400, fixed_params=fixed, tolerances=(1e-4,),
                         memory_budget=budget)
    over = plan_check(x, y, tight, calibration=plan.calibration)
    message = budget_refusal(over, x, y, tight)
    assert message is not None and "--probes 100" in message
    assert "--memory-budget" in message and "\n" not in message


def test_the_plan_in_check_json_names_the_references_used(data_file, tmp_path, capsys):
    out = tmp_path / "o"
    code = _run(_args(data_file, out, *FIXED, "--tolerances", "1e-2,1e-6",
                      "--solver-seeds", "1", "--no-refit", "--json"))
    capsys.readouterr()
    assert code in (ExitCode.OK, ExitCode.FINDING)
    result = json.loads((out / "check.json").read_text())
    plan = result["plan"]
    assert plan["reference"] == result["reference"] == "dense"
    used = {group: entry["kind"] for group, entry in result["reference_by_metric"].items()}
    assert {group: entry["kind"] for group, entry in plan["reference_by_metric"].items()} \
        == used
    audits = next(s for s in plan["stages"] if s["stage"] == "audits")
    assert audits["knob_values"] == 2 and audits["seeds"] == 1
    assert plan["peak_bytes"] <= plan["memory_budget_bytes"]
    assert plan["calibration"]["unit"]["seconds"] > 0


def test_metric_kinds_kronecker_has_no_kriging():
    # audit_references.StructuredReference: the Kronecker reference offers no kriging.
    assert metric_kinds("kronecker") == {"loglik": "kronecker", "score": "kronecker",
                                         "kriging": None}
    assert set(metric_kinds("dense").values()) == {"dense"}


def test_solver_memory_extrapolation_against_its_nbytes():
    # Expected value: the solver's own nbytes at n = 4,096 (harness.solvers.hodlr), against
    # the power law fitted at CALIBRATION_SIZES (512 and 2,048 points) and extrapolated
    # to 4,096; within a factor 2 either way.
    x, _ = _points(4096, seed=5)
    kernel = make_kernel("matern32", {"variance": 1.0, "lengthscale": 2.0, "nugget": 0.1})
    hodlr = resolve_solver("hodlr")
    rate = rate_solver(hodlr, 1e-8, x, kernel, options={"leaf_size": 128},
                       rng=np.random.default_rng(1))
    assert rate.n_measured == CALIBRATION_SIZES[1] < 4096
    measured = hodlr.factorize(x, kernel, kernel.theta, tol=1e-8, leaf_size=128).nbytes
    assert 0.5 <= rate.nbytes_at(4096) / measured <= 2.0


def test_dense_reference_memory_against_tracemalloc():
    # Expected value: the peak that tracemalloc traces (numpy reports its allocations to
    # it) while the dense reference's child work runs in this process at n = 300; the
    # plan's stage is dense_budget.dense_bytes_needed(n, score=True). Within a factor 2.
    x, y = _points()
    options = CheckOptions(fixed_params={"variance": 1.0, "lengthscale": 2.0,
                                         "nugget": 0.1}, tolerances=(1e-4,))
    plan = plan_check(x, y, options, rng=np.random.default_rng(0))
    predicted = next(s for s in plan.stages if s.stage == "reference").peak_bytes
    kernel = make_kernel("matern32", {"variance": 1.0, "lengthscale": 2.0, "nugget": 0.1})
    holdout = np.arange(0, N, 10)
    probes = np.random.default_rng(2).choice([-1.0, 1.0], size=(N, 16))
    tracemalloc.start()
    try:
        dense_sides(x, y, kernel, mean="constant", holdout=holdout, probes=probes,
                    memory_budget=None)
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    assert predicted is not None
    assert 0.5 <= predicted / peak <= 2.0, (predicted, peak)


def test_resident_memory_counts_an_interpreter_per_process():
    # The resident prediction adds the check's own resident memory, measured by psutil when
    # the calibration began, once per process alive at the peak (cost_plan's docstring).
    # Expected value: psutil's reading of this process now, which has numpy, scipy, numba
    # and harness loaded as the check has; the calibration's reading is within 2x of it.
    import psutil

    from harness.check.cost_plan import RESIDENT_PROCESSES

    x, y = _points()
    plan = plan_check(x, y, CheckOptions(fixed_params={"variance": 1.0, "lengthscale": 2.0,
                                                       "nugget": 0.1}, tolerances=(1e-4,)),
                      rng=np.random.default_rng(0))
    runtime = plan.calibration.runtime_bytes
    assert 0.5 <= runtime / psutil.Process().memory_info().rss <= 2.0
    assert plan.resident_bytes == plan.peak_bytes + RESIDENT_PROCESSES * runtime
    assert plan.to_dict()["resident_bytes"] == plan.resident_bytes


def test_no_budget_beyond_the_machine_is_advised(monkeypatch):
    # Never impossible advice (issue 22): a --memory-budget above this machine's memory is
    # not offered; with nothing else that fits, the refusal says so. The machine's memory
    # is set to 1 MiB here (harness.linalg.dense_budget.total_memory, as read by the plan).
    import harness.check.cost_plan as cost_plan

    x, y = _points()
    fixed = {"variance": 1.0, "lengthscale": 2.0, "nugget": 0.1}
    tight = CheckOptions(fixed_params=fixed, tolerances=(1e-4,), memory_budget=1024)
    plan = plan_check(x, y, tight, rng=np.random.default_rng(0))
    assert not plan.fits_budget
    monkeypatch.setattr(cost_plan, "total_memory", lambda: 2**20)
    message = budget_refusal(plan, x, y, tight)
    assert message is not None and "--memory-budget" not in message
    assert "machine with more memory" in message and "\n" not in message


def test_an_operator_plan_over_the_budget_is_offered_the_vecchia_preconditioner():
    # The Vecchia factor needs O(n m) memory where HODLR at tol 1e-10 needs far more
    # (harness.audit.operator_preconditioner); the refusal re-plans with it and names it
    # when it fits. At 300 points both are small beside the fit's dense Fisher
    # information, so HODLR's measured size is scaled up here (to 200 MB at 2,048 points)
    # as it is at large n, where the reference's preconditioner is the peak; the
    # re-plan rates Vecchia for real. A budget between the two plans' peaks.
    x, y = _points()
    fixed = {"variance": 1.0, "lengthscale": 2.0, "nugget": 0.1}
    hodlr = CheckOptions(fixed_params=fixed, tolerances=(1e-4,), reference="operator",
                         refit=False)
    measured = plan_check(x, y, hodlr, rng=np.random.default_rng(0)).calibration
    heavy = replace(measured.solvers["preconditioner"], nbytes=200 * 2**20)
    calibration = replace(measured, solvers={**measured.solvers, "preconditioner": heavy})
    plan = plan_check(x, y, hodlr, calibration=calibration)
    vecchia = plan_check(x, y, replace(hodlr, preconditioner="vecchia"),
                         rng=np.random.default_rng(0))
    assert plan.peak_stage.stage == "reference" and vecchia.peak_bytes < plan.peak_bytes
    budget = (plan.peak_bytes + vecchia.peak_bytes) // 2
    over = plan_check(x, y, replace(hodlr, memory_budget=budget), calibration=calibration)
    message = budget_refusal(over, x, y, replace(hodlr, memory_budget=budget))
    assert message is not None and "--preconditioner vecchia" in message


def test_the_operator_is_calibrated_only_for_a_plan_that_takes_it(monkeypatch):
    # A dense-reference plan never runs exact products, so it does not time them (on a
    # fresh install that would compile the product kernel for nothing); the refusal's
    # alternatives that take the operator rate it when they are priced.
    import harness.check.cost_plan as cost_plan

    x, y = _points()
    fixed = {"variance": 1.0, "lengthscale": 2.0, "nugget": 0.1}
    dense = CheckOptions(fixed_params=fixed, tolerances=(1e-4,), refit=False)
    plan = plan_check(x, y, dense, rng=np.random.default_rng(0))
    assert plan.reference == "dense"
    assert plan.calibration.product_cost is None
    assert "preconditioner" not in plan.calibration.solvers
    operator = plan_check(x, y, replace(dense, reference="operator"),
                          rng=np.random.default_rng(0))
    assert operator.calibration.product_cost is not None
    assert operator.calibration.to_dict()["product_columns_per_second"] > 0
    assert operator.calibration.solvers["preconditioner"].name == "hodlr"
    rated: list[bool] = []
    original = cost_plan._with_operator_rates

    def spy(calibration, points, values, options):
        rated.append(calibration.product_cost is None)
        return original(calibration, points, values, options)

    monkeypatch.setattr(cost_plan, "_with_operator_rates", spy)
    # A budget no plan fits: the dense reference does not, so the plan takes the
    # operator, and the dense calibration gets the operator's rates added
    over = plan_check(x, y, replace(dense, memory_budget=1), calibration=plan.calibration)
    assert over.reference == "operator" and rated == [True]
    assert over.calibration.product_cost is not None
    assert budget_refusal(over, x, y, replace(dense, memory_budget=1)) is not None


def test_beyond_the_machine_an_option_with_a_budget_is_advised(monkeypatch):
    # When no budget this machine has holds the plan and no option alone fits the budget,
    # the option that lowers the peak most is named with the budget it needs (the 131,072
    # point plan of benchmarks/check_at_scale.py: --preconditioner vecchia with 16.4 GiB).
    # The machine's memory is set between the Vecchia plan's budget and the plan's.
    import harness.check.cost_plan as cost_plan

    x, y = _points()
    fixed = {"variance": 1.0, "lengthscale": 2.0, "nugget": 0.1}
    hodlr = CheckOptions(fixed_params=fixed, tolerances=(1e-4,), reference="operator",
                         refit=False, memory_budget=1024)
    plan = plan_check(x, y, hodlr, rng=np.random.default_rng(0))
    vecchia = plan_check(x, y, replace(hodlr, preconditioner="vecchia"),
                         rng=np.random.default_rng(0))
    machine = int(1.05 * plan.peak_bytes)       # below the plain budget, 1.1 x the peak
    assert cost_plan._budget_for(vecchia.peak_bytes) * 2**30 < machine
    monkeypatch.setattr(cost_plan, "total_memory", lambda: machine)
    message = budget_refusal(plan, x, y, hodlr)
    assert message is not None and " --memory-budget " in message
    suggestion = message.split("it would fit with ")[1].split()
    assert suggestion[0].startswith("--") and suggestion[0] != "--memory-budget"
    assert suggestion.count("--memory-budget") == 1
    budget_gib = float(suggestion[suggestion.index("--memory-budget") + 1])
    assert budget_gib * 2**30 <= cost_plan.total_memory()


def test_the_line_fit_is_priced_from_a_timed_filter_pass():
    # The exact fit on a line (harness.check.line_fit) is priced from one timed Kalman
    # pass per point (plan_calibration.line_pass_rate); a plane plan times none.
    rng = np.random.default_rng(6)
    x = np.sort(rng.uniform(0.0, 50.0, 5000))[:, None]
    y = np.sin(x[:, 0]) + 0.1 * rng.standard_normal(5000)
    options = CheckOptions(kernel="matern32", tolerances=(1e-4,), refit=False)
    plan = plan_check(x, y, options, rng=np.random.default_rng(0))
    rate = plan.calibration.line_pass_seconds_per_point
    assert plan.fit.engine == "statespace" and rate is not None and rate > 0
    (fit,) = [s for s in plan.stages if s.stage == "fit"]
    assert fit.seconds == pytest.approx(LINE_FIT_PASSES * 5000 * rate)
    plane = plan_check(*_points(), CheckOptions(tolerances=(1e-4,), refit=False),
                       rng=np.random.default_rng(0))
    assert plane.calibration.line_pass_seconds_per_point is None


def test_the_statespace_reference_is_priced_in_timed_kalman_passes():
    # With fixed parameters there is no fit on the line, yet the state-space reference
    # times one Kalman pass (plan_calibration.line_pass_rate) and is priced in passes of
    # it, not by a fixed rate per point.
    rng = np.random.default_rng(7)
    x = np.sort(rng.uniform(0.0, 50.0, 5000))[:, None]
    y = np.sin(x[:, 0]) + 0.1 * rng.standard_normal(5000)
    fixed = {"variance": 1.0, "lengthscale": 2.0, "nugget": 0.1}
    options = CheckOptions(kernel="matern32", fixed_params=fixed, reference="statespace",
                           tolerances=(1e-4,), refit=False)
    plan = plan_check(x, y, options, rng=np.random.default_rng(0))
    rate = plan.calibration.line_pass_seconds_per_point
    assert rate is not None and rate > 0
    (reference,) = [s for s in plan.stages if s.stage == "reference"]
    assert reference.seconds == pytest.approx(STATESPACE_REFERENCE_PASSES * 5000 * rate)
    assert f"{STATESPACE_REFERENCE_PASSES} Kalman passes" in reference.detail


def test_each_knob_value_is_priced_at_its_own_rate():
    # A looser value is cheaper (HODLR on 65,536 scattered points: about 30 s per audit at
    # tol 1e-6 against 70 s at 1e-8, the timestamps in
    # benchmarks/results/check_at_scale_plane-65k.json); pricing every value at the
    # tightest overstated the audits 2.6 times there (that file's first version). The
    # audit stage is the seeds times the sum of the values' audits.
    x, y = _points()
    fixed = {"variance": 1.0, "lengthscale": 2.0, "nugget": 0.1}
    options = CheckOptions(fixed_params=fixed, tolerances=(1e-4, 1e-8), refit=False,
                           solver_seeds=2)
    plan = plan_check(x, y, options, rng=np.random.default_rng(0))
    rated = plan.calibration.value_rates["hodlr"]
    assert [r.value for r in rated] == [1e-4, 1e-8]
    assert rated[-1] == plan.calibration.solvers["hodlr"]
    assert plan.calibration.to_dict()["value_rates"]["hodlr"][0]["value"] == 1e-4
    audits = next(stage for stage in plan.stages if stage.stage == "audits")
    assert "tol 0.0001 to 1e-08" in audits.detail

    def audit_seconds(loose):
        calibration = replace(plan.calibration, value_rates={"hodlr": (loose, rated[1])})
        again = plan_check(x, y, options, calibration=calibration)
        return next(stage for stage in again.stages if stage.stage == "audits").seconds

    def scaled(factor):
        return replace(rated[1], value=1e-4, factor_seconds=factor * rated[1].factor_seconds,
                       solve_seconds_per_column=factor * rated[1].solve_seconds_per_column)

    # unrated values fall back to the tightest, which is the tightest rated twice
    unrated = plan_check(x, y, options, calibration=replace(plan.calibration, value_rates={}))
    as_tight = next(stage for stage in unrated.stages if stage.stage == "audits").seconds
    assert audit_seconds(rated[1]) == pytest.approx(as_tight, rel=1e-12)
    # the loose value's solver share at 0, 1 and 10 times the tight one's: linear in it
    free, same, tenfold = audit_seconds(scaled(0.0)), audit_seconds(scaled(1.0)), \
        audit_seconds(scaled(10.0))
    assert same == pytest.approx(as_tight, rel=1e-12) and free < same
    assert tenfold - free == pytest.approx(10 * (same - free), rel=1e-9)
    assert audits.seconds == pytest.approx(audit_seconds(rated[0]), rel=1e-12)


def test_the_operator_stage_follows_the_measured_iteration_counts():
    # The reference's products are its CG iterations and Lanczos steps, measured on a
    # window of the data (harness.references.operator.iteration_counts): with every
    # count doubled the stage's product time grows, and the detail names the counts.
    x, y = _points()
    fixed = {"variance": 1.0, "lengthscale": 2.0, "nugget": 0.1}
    options = CheckOptions(fixed_params=fixed, tolerances=(1e-4,), reference="operator",
                           refit=False)
    plan = plan_check(x, y, options, rng=np.random.default_rng(0))
    counts = plan.calibration.operator_counts
    assert counts is not None and counts.converged and counts.cg_iterations >= 1
    assert plan.calibration.to_dict()["operator_iterations"]["n"] == counts.n
    reference = next(stage for stage in plan.stages if stage.stage == "reference")
    assert f"about {counts.cg_iterations} CG iterations" in reference.detail
    more = replace(counts, cg_iterations=2 * counts.cg_iterations + 5,
                   lanczos_steps=2 * counts.lanczos_steps + 5)
    slower = plan_check(x, y, options, calibration=replace(plan.calibration,
                                                           operator_counts=more))
    assert next(stage for stage in slower.stages
                if stage.stage == "reference").seconds > reference.seconds
