"""The regression gate's options: new spellings, old ones as hidden deprecated aliases.

Expected values are the gate's own defaults (harness/analysis/regression.py, "common
practice chosen for covaudit") and the translation table in harness/cli/compare_command.py.
"""

from __future__ import annotations

import argparse
import json
from pathlib import Path

import numpy as np
import pytest
from synthetic import write_synthetic_run

from harness.analysis.regression import AccuracyCheck, SpeedCheck
from harness.cli import compare_command as compare_cli

SMALL = dict(sizes=(500, 1000), tolerances=(1e-4,), seeds=(0,), probes=(16,))
OLD_SPELLINGS = ("--fail-on", "--accuracy-only", "--speed-across-machines",
                 "--allow-missing", "--fail-on-missing")
NEW_SPELLINGS = ("--max-ratio", "--ignore-below", "--speed-checks", "--missing-tasks",
                 "--no-report")


def _parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(prog="covaudit")
    compare_cli.add_parser(parser.add_subparsers())
    return parser


def _gate(argv: list[str]) -> compare_cli.GateOptions:
    return compare_cli.gate_options(_parser().parse_args(["compare", "B", "N", *argv]))


@pytest.mark.parametrize(("old", "new"), [
    (["--fail-on", "loglik_abs_err:3x"], ["--max-ratio", "loglik_abs_err=3"]),
    (["--fail-on", "loglik_abs_err:3x:1e-9"],
     ["--max-ratio", "loglik_abs_err=3", "--ignore-below", "loglik_abs_err=1e-9"]),
    (["--fail-on", "t_factor:1.5x"], ["--max-ratio", "t_factor=1.5"]),
    (["--accuracy-only"], ["--speed-checks", "off"]),
    (["--speed-across-machines"], ["--speed-checks", "any-machine"]),
    (["--allow-missing"], ["--missing-tasks", "list"]),
    (["--fail-on-missing"], ["--missing-tasks", "fail"]),
])
def test_old_and_new_spellings_ask_for_the_same_gate(old, new):
    assert _gate(old) == _gate(new)
    assert _gate(new) != _gate([]) or new == ["--missing-tasks", "fail"]


def test_new_spellings_set_the_checks():
    # Defaults: error metrics at 2 over their floor, t_factor and t_total at 1.25
    # (harness/analysis/regression.py, common practice chosen for covaudit).
    default = {c.metric: c for c in _gate([]).checks}
    assert default["loglik_abs_err"] == AccuracyCheck("loglik_abs_err", 2.0, 1e-6)
    assert default["t_factor"] == SpeedCheck("t_factor", 1.25)
    gate = _gate(["--max-ratio", "loglik_err_nat=3", "--ignore-below", "loglik_abs_err=1e-4",
                  "--max-ratio", "t_total=2", "--speed-checks", "same-machine"])
    checks = {c.metric: c for c in gate.checks}
    assert checks["loglik_abs_err"] == AccuracyCheck("loglik_abs_err", 3.0, 1e-4)
    assert checks["t_total"] == SpeedCheck("t_total", 2.0)
    assert not any(isinstance(c, SpeedCheck) for c in _gate(["--speed-checks", "off"]).checks)


def test_help_shows_only_the_new_spellings():
    subparsers = next(a for a in _parser()._actions
                      if isinstance(a, argparse._SubParsersAction))
    text = subparsers.choices["compare"].format_help()
    for flag in NEW_SPELLINGS:
        assert flag in text
    for flag in OLD_SPELLINGS:
        assert flag not in text


def test_readme_shows_only_the_new_spellings():
    readme = (Path(__file__).resolve().parents[1] / "README.md").read_text(encoding="utf-8")
    for flag in ("--max-ratio", "--ignore-below", "--speed-checks", "--missing-tasks"):
        assert flag in readme
    for flag in OLD_SPELLINGS:
        assert flag not in readme


@pytest.mark.parametrize(("argv", "note"), [
    (["--accuracy-only"], "--accuracy-only is deprecated; use --speed-checks off"),
    (["--fail-on", "t_factor:2x"], "--fail-on is deprecated; use --max-ratio METRIC=R"),
    (["--allow-missing"], "--allow-missing is deprecated; use --missing-tasks list"),
])
def test_old_spelling_prints_one_deprecation_line(argv, note, capsys):
    _parser().parse_args(["compare", "B", "N", *argv])
    err = capsys.readouterr().err.splitlines()
    assert len(err) == 1 and note in err[0]


def test_new_spellings_print_no_note(capsys):
    _parser().parse_args(["compare", "B", "N", "--speed-checks", "off",
                          "--max-ratio", "t_factor=2"])
    assert capsys.readouterr().err == ""


@pytest.mark.parametrize(("argv", "message"), [
    (["--max-ratio", "loglik_abs_err=0.5"], "--max-ratio 'loglik_abs_err=0.5': expected a "
                                            "ratio >= 1, got 0.5"),
    (["--max-ratio", "loglik_abs_err"], "expected METRIC=VALUE"),
    (["--ignore-below", "loglik_abs_err=-1"], "expected an error value >= 0"),
    (["--ignore-below", "t_factor=1"], "a floor applies to error metrics only"),
    (["--max-ratio", "nosuch=2"], "unknown metric 'nosuch'"),
    (["--max-ratio", "t_factor=2", "--max-ratio", "t_factor=3"], "given twice"),
    (["--speed-checks", "off", "--speed-across-machines"], "contradict"),
    (["--missing-tasks", "list", "--fail-on-missing"], "contradict"),
])
def test_bad_gate_options_exit_2_naming_the_option(argv, message, capsys):
    args = _parser().parse_args(["compare", "B", "N", *argv])
    assert compare_cli.run(args) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert message in err[-1] and err[-1].startswith("covaudit compare: ")


def test_unknown_speed_mode_is_refused_by_its_spec(capsys):
    with pytest.raises(SystemExit) as exc:
        _parser().parse_args(["compare", "B", "N", "--speed-checks", "fast"])
    assert exc.value.code == 2
    assert "--speed-checks: expected one of any-machine, off, same-machine, got 'fast'" \
        in capsys.readouterr().err


def test_old_and_new_spellings_give_the_same_comparison(tmp_path):
    write_synthetic_run(tmp_path / "base", rng=np.random.default_rng(0), **SMALL)
    runs = {}
    for name, argv in (("old", ["--fail-on", "loglik_abs_err:1x:0", "--accuracy-only"]),
                       ("new", ["--max-ratio", "loglik_abs_err=1",
                                "--ignore-below", "loglik_abs_err=0",
                                "--speed-checks", "off"])):
        write_synthetic_run(tmp_path / name, rng=np.random.default_rng(1), error_scale=5.0,
                            **SMALL)
        args = _parser().parse_args(["compare", str(tmp_path / "base"), str(tmp_path / name),
                                     *argv])
        code = compare_cli.run(args)
        data = json.loads((tmp_path / name / "comparison.json").read_text())
        runs[name] = (code, data["checks"], [(f["metric"], f["task"], f["current"])
                                             for f in data["findings"]])
    assert runs["old"][0] == 1                         # error_scale=5 plants a regression
    assert runs["old"][2]                              # findings exist: not an empty pass
    assert runs["old"] == runs["new"]
