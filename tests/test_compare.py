"""Regression comparison: checks, Mann-Whitney significance, CLI exit codes."""

from __future__ import annotations

import argparse
import json

import numpy as np
import pytest
from scipy import stats
from synthetic import write_synthetic_run

from harness.analysis import load_run
from harness.analysis.regression import (
    AccuracyCheck,
    CheckSyntaxError,
    SpeedCheck,
    compare_runs,
    default_checks,
    load_comparison,
    parse_check,
)
from harness.cli import compare_command as compare_cli

SMALL = dict(sizes=(500, 1000, 2000), tolerances=(1e-4, 1e-6), seeds=(0, 1), probes=(16,))


def _run(path, *, seed=0, **kw):
    return write_synthetic_run(path, rng=np.random.default_rng(seed), **{**SMALL, **kw})


def _cli(argv):
    parser = argparse.ArgumentParser()
    compare_cli.add_parser(parser.add_subparsers())
    return compare_cli.run(parser.parse_args(["compare", *argv]))


def test_accuracy_check_factor_and_floor():
    check = AccuracyCheck("logdet_abs_err", factor=2.0, floor=1e-6)
    assert check.fails(3e-3, 1e-3)
    assert not check.fails(1.9e-3, 1e-3)
    assert not check.fails(9e-7, 1e-9)   # under the floor
    assert check.fails(1e-5, 0.0)        # exact baseline, error now above the floor
    # A metric finite in the baseline and NaN now is a regression (issue 12, defect 2).
    assert check.fails(np.nan, 1e-3)
    assert not check.fails(np.nan, np.nan)   # nothing measured in the baseline


def test_speed_check_uses_mann_whitney():
    # p-value source: scipy.stats.mannwhitneyu, one-sided "greater".
    rng = np.random.default_rng(0)
    base = rng.lognormal(0, 0.05, 7)
    slow = 1.6 * rng.lognormal(0, 0.05, 7)
    check = SpeedCheck("t_factor", ratio=1.25)
    out = check.assess(slow, base)
    assert out.p_value == pytest.approx(
        stats.mannwhitneyu(slow, base, alternative="greater").pvalue)
    assert out.ratio == pytest.approx(np.median(slow) / np.median(base))
    assert check.fails(slow, base)
    assert not check.fails(1.1 * base, base)           # below the ratio
    assert not check.fails([1.0, 5.0], [1.0, 1.1])     # large ratio, not significant


def test_parse_check():
    assert parse_check("logdet_abs_err:3x") == AccuracyCheck("logdet_abs_err", 3.0, 1e-6)
    assert parse_check("loglik_abs_err:2x:1e-9").floor == 1e-9
    assert parse_check("t_factor:1.25x") == SpeedCheck("t_factor", 1.25)
    for bad in ("logdet_abs_err", "nosuch:2x", "t_factor:0.5x", "t_factor:2x:1"):
        with pytest.raises(CheckSyntaxError):
            parse_check(bad)


def test_accuracy_only_drops_speed_checks():
    assert not any(isinstance(c, SpeedCheck) for c in default_checks(accuracy_only=True))
    override = default_checks(overrides=[parse_check("t_total:2x")])
    assert SpeedCheck("t_total", 2.0) in override


def test_identical_runs_exit_0(tmp_path):
    _run(tmp_path / "base")
    _run(tmp_path / "new")
    assert _cli([str(tmp_path / "base"), str(tmp_path / "new"), "--no-report"]) == 0


def test_planted_accuracy_regression_exits_1_and_writes_report(tmp_path):
    _run(tmp_path / "base")
    _run(tmp_path / "new", error_scale=5.0)
    assert _cli([str(tmp_path / "base"), str(tmp_path / "new"), "--accuracy-only"]) == 1
    comparison = load_comparison(tmp_path / "new" / "comparison.json")
    assert comparison.regressed
    assert {f.kind for f in comparison.findings} == {"accuracy"}
    json.loads((tmp_path / "new" / "comparison.json").read_text())  # strict JSON (no NaN)
    html = (tmp_path / "new" / "report.html").read_text()
    assert "Comparison with a baseline" in html and "regression(s)" in html


def test_planted_slowdown_fails_only_with_speed_checks(tmp_path):
    _run(tmp_path / "base", seed=0)
    _run(tmp_path / "new", seed=1, slowdown=1.8)
    args = [str(tmp_path / "base"), str(tmp_path / "new"), "--no-report"]
    assert _cli([*args, "--accuracy-only"]) == 0
    comparison = compare_runs(load_run(tmp_path / "base"), load_run(tmp_path / "new"))
    assert comparison.findings and {f.kind for f in comparison.findings} == {"speed"}
    assert all(f.p_value <= 0.05 for f in comparison.findings)
    assert _cli(args) == 1


def test_missing_extra_and_failed_tasks(tmp_path):
    _run(tmp_path / "base", include_failure=False)
    _run(tmp_path / "new", include_failure=True, sizes=(500, 1000, 4000))
    comparison = compare_runs(load_run(tmp_path / "base"), load_run(tmp_path / "new"))
    assert comparison.missing and comparison.extra
    assert any(f.kind == "status" and "now failed" in f.note for f in comparison.findings)


def test_unreadable_input_exits_2(tmp_path):
    _run(tmp_path / "base")
    assert _cli([str(tmp_path / "base"), str(tmp_path / "absent")]) == 2
    assert _cli([str(tmp_path / "base"), str(tmp_path / "base"), "--fail-on", "x:2x"]) == 2


# -- issue 12: the gate cannot pass silently -------------------------------------------

def _edit_results(run_dir, edit):
    """Rewrite results.csv of ``run_dir`` through ``edit(frame) -> frame``."""
    import pandas as pd

    path = run_dir / "results.csv"
    frame = pd.read_csv(path, dtype=str)
    edit(frame).to_csv(path, index=False)


def _versioned_pair(tmp_path, *, bump=True):
    """Two identical synthetic runs carrying pair_key; the new one's solver version (and so
    its versioned key) changed, as after a release."""
    _run(tmp_path / "base")
    _run(tmp_path / "new")

    def add_pair_key(frame):
        frame.insert(1, "pair_key", frame["key"])
        return frame

    def bump_version(frame):
        frame = add_pair_key(frame)
        if bump:
            frame["key"] = frame["key"].map(lambda k: "v2" + k[2:])
            frame["solver_version"] = frame["solver_version"] + ".post1"
        return frame

    _edit_results(tmp_path / "base", add_pair_key)
    _edit_results(tmp_path / "new", bump_version)
    return tmp_path / "base", tmp_path / "new"


def test_version_bump_still_pairs_every_task_and_reports_the_version(tmp_path, capsys):
    # Defect 1: keys hashed the version, so a bump paired 0 tasks and exited 0.
    base, new = _versioned_pair(tmp_path)
    comparison = compare_runs(load_run(base), load_run(new))
    assert comparison.pair_column == "pair_key"
    assert comparison.paired == comparison.baseline_tasks == len(load_run(base).results)
    assert {v.metric for v in comparison.versions} == {"solver_version"}
    assert not comparison.regressed
    assert _cli([str(base), str(new), "--accuracy-only", "--no-report"]) == 0
    assert "version" in capsys.readouterr().out


def test_version_bump_with_planted_error_is_caught(tmp_path):
    # Defect 1: "0 paired; 0 regressions" even with a 1000x log-det error injected.
    base, new = _versioned_pair(tmp_path)

    def inject(frame):
        err = frame["logdet_abs_err"].astype(float) * 1000 + 1.0
        frame["logdet_abs_err"] = err.astype(str)
        return frame

    _edit_results(new, inject)
    assert _cli([str(base), str(new), "--accuracy-only", "--no-report"]) == 1


def test_zero_pairs_fail(tmp_path, capsys):
    # A run of a different case pairs nothing: exit 1 naming that (defect 1).
    _run(tmp_path / "base")
    _run(tmp_path / "new", case="other")
    _edit_results(tmp_path / "new", lambda f: f.assign(key=f["key"].map(lambda k: "x" + k)))
    assert _cli([str(tmp_path / "base"), str(tmp_path / "new"), "--accuracy-only",
                 "--no-report"]) == 1
    assert "0 of" in capsys.readouterr().out
    comparison = compare_runs(load_run(tmp_path / "base"), load_run(tmp_path / "new"))
    assert any(f.kind == "gate" and f.metric == "paired" for f in comparison.findings)


@pytest.mark.parametrize("metric", ["logdet_abs_err", "loglik_abs_err", "param_shift_se_max",
                                    "kriging_mean_err_sd_max"])
def test_nan_metric_is_a_regression(tmp_path, metric):
    # Defect 2: NaN log-det, log-lik, parameter-shift and kriging errors passed.
    base, new = _versioned_pair(tmp_path, bump=False)
    _edit_results(new, lambda f: f.assign(**{metric: "nan"}))
    comparison = compare_runs(load_run(base), load_run(new), checks=default_checks(
        accuracy_only=True))
    assert any(f.metric == metric and "finite in the baseline" in f.note
               for f in comparison.findings)
    assert _cli([str(base), str(new), "--accuracy-only", "--no-report"]) == 1


def test_absent_metric_column_is_a_regression(tmp_path):
    base, new = _versioned_pair(tmp_path, bump=False)
    _edit_results(new, lambda f: f.drop(columns=["loglik_abs_err"]))
    comparison = compare_runs(load_run(base), load_run(new),
                              checks=default_checks(accuracy_only=True))
    assert any(f.metric == "loglik_abs_err" for f in comparison.findings)


def test_missing_baseline_tasks_fail_unless_allowed(tmp_path):
    base, new = _versioned_pair(tmp_path, bump=False)
    _edit_results(new, lambda f: f.iloc[: len(f) // 2])
    args = [str(base), str(new), "--accuracy-only", "--no-report"]
    assert _cli(args) == 1
    assert _cli([*args, "--allow-missing"]) == 0


def test_speed_is_skipped_between_different_machines(tmp_path):
    _run(tmp_path / "base", seed=0)
    _run(tmp_path / "new", seed=1, slowdown=1.8)
    meta_path = tmp_path / "new" / "run.json"
    meta = json.loads(meta_path.read_text())
    meta["cpu"] = {"model": "Another CPU", "cores": 64}
    meta_path.write_text(json.dumps(meta))
    comparison = compare_runs(load_run(tmp_path / "base"), load_run(tmp_path / "new"))
    assert comparison.speed.startswith("skipped: machine fingerprints differ")
    assert "Another CPU" in comparison.speed and not comparison.regressed
    across = compare_runs(load_run(tmp_path / "base"), load_run(tmp_path / "new"),
                          speed_across_machines=True)
    assert {f.kind for f in across.findings} == {"speed"}
    args = [str(tmp_path / "base"), str(tmp_path / "new"), "--no-report"]
    assert _cli(args) == 0
    assert _cli([*args, "--speed-across-machines"]) == 1
