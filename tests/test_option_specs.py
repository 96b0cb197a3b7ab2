"""Options validated once (``harness/infra/option_specs.py``): one bad value gives the same
core message through the command line, a case file and the check pipeline, each prefixed
by where it came from (the flag, or ``file.toml: key``)."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from harness.check import CheckOptions, run_check, validate
from harness.check.datafile import observations_from_arrays
from harness.check.pipeline import CheckError, split_holdout
from harness.cli import main
from harness.grid.cases import CaseFileError, load_case
from harness.infra.option_specs import (
    HOLDOUT_FRACTION,
    LADDER_FACTOR,
    PROBES,
    SOLVER_SEEDS,
    TOLERANCE,
    Interval,
    OptionError,
    OptionSpec,
    check_values,
)

ROOT = Path(__file__).resolve().parents[1]
SMOKE = (ROOT / "cases" / "smoke.toml").read_text(encoding="utf-8")

#: (spec, CLI verb and flag or None, case-file (table, key) or None, pipeline field or
#: None, bad values); each option exists in at least two of the three.
OPTIONS = [
    (SOLVER_SEEDS, ("check", "--solver-seeds"), None, "solver_seeds", [0, 1001, -5]),
    (HOLDOUT_FRACTION, ("check", "--holdout"), None, "holdout", [0.0, 0.6, 1.5]),
    (TOLERANCE, ("check", "--tolerances"), ("solvers", "tolerances"), "tolerances",
     [0.0, 1.0, 2.0, -1e-3]),
    (TOLERANCE, ("evaluate", "--tol"), None, None, [0.0, 1.0]),
    (LADDER_FACTOR, ("check", "--ladder-factor"), ("reference", "ladder_factor"),
     "ladder_factor", [1.0, 0.5, -2.0]),
    (PROBES, ("check", "--probes"), ("trace", "probes"), None, [0, -3]),
]
CASES = [(spec, cli, case, field, bad) for spec, cli, case, field, values in OPTIONS
         for bad in values]


def _cli_message(verb: str, flag: str, bad: object, capsys: pytest.CaptureFixture[str],
                 tmp_path: Path) -> str:
    data = tmp_path / "data.csv"
    data.write_text("x,y,z\n0,0,1\n1,0,2\n0,1,3\n", encoding="utf-8")
    argv = [verb, str(data), "--coords", "x,y", "--value", "z", flag, repr(bad),
            "--out", str(tmp_path / "out")]
    try:
        code = main(argv)
    except SystemExit as exc:           # argparse: "argument --flag: <core>"
        code = int(exc.code or 0)
    assert code == 2
    return capsys.readouterr().err


def _case_message(table: str, key: str, bad: object, tmp_path: Path) -> str:
    text = SMOKE
    if table == "solvers":
        text = text.replace("tolerances = [1e-4, 1e-8]", f"tolerances = [{bad!r}]")
    elif table == "trace":
        text = text.replace('method = "exact"', f'method = "exact"\nprobes = {bad!r}')
    else:
        text += f"\n[{table}]\n{key} = {bad!r}\n"
    path = tmp_path / "bad.toml"
    path.write_text(text, encoding="utf-8")
    with pytest.raises(CaseFileError) as info:
        load_case(path)
    return str(info.value)


def _pipeline_message(field: str, bad: object) -> str:
    if field == "holdout":
        with pytest.raises(CheckError) as info:
            split_holdout(100, float(bad), np.random.default_rng(0))  # type: ignore[arg-type]
        return str(info.value)
    rng = np.random.default_rng(0)
    data = validate(observations_from_arrays(rng.uniform(size=(40, 2)), rng.normal(size=40),
                                             source="test"))
    value = (bad,) if field == "tolerances" else bad
    with pytest.raises(CheckError) as info:
        run_check(data, CheckOptions(**{field: value}), source="test")
    return str(info.value)


@pytest.mark.parametrize(("spec", "cli", "case", "field", "bad"), CASES,
                         ids=[f"{s.name}-{c[1] if c else f}-{b}" for s, c, _, f, b in CASES])
def test_same_core_message_everywhere(spec: OptionSpec, cli: tuple[str, str] | None,
                                      case: tuple[str, str] | None, field: str | None,
                                      bad: object, capsys: pytest.CaptureFixture[str],
                                      tmp_path: Path) -> None:
    core = spec.problem(bad)
    assert core is not None and core.startswith("expected ")
    assert sum(x is not None for x in (cli, case, field)) >= 1
    if cli is not None:
        err = _cli_message(*cli, bad, capsys, tmp_path)
        assert f"{cli[1]}: {core}" in err, err
    if case is not None:
        message = _case_message(*case, bad, tmp_path)
        assert "bad.toml:" in message and f"{case[1]}" in message
        assert core in message, message
    if field is not None:
        message = _pipeline_message(field, bad)
        assert core in message and message.startswith("--"), message


def test_valid_values_pass_unchanged() -> None:
    assert SOLVER_SEEDS.parse("1000") == 1000
    assert HOLDOUT_FRACTION.parse("0.5") == 0.5
    assert TOLERANCE.parse_list("1e-2, 1e-8", where="--tolerances") == (1e-2, 1e-8)
    assert LADDER_FACTOR.validate(100, where="x") == 100.0


def test_text_that_is_no_number_is_shown_as_given() -> None:
    with pytest.raises(OptionError) as info:
        SOLVER_SEEDS.parse("three")
    assert info.value.core == "expected an integer in [1, 1000], got 'three'"


def test_a_list_of_values_against_an_interval_for_knob_declarations() -> None:
    interval = Interval(int, 1, 64)
    assert check_values([1, 8, 64], interval, where="knob leaf_size") == [1, 8, 64]
    with pytest.raises(OptionError) as info:
        check_values([8, 0], interval, where="vecchia.toml: knobs.leaf_size")
    assert str(info.value) == ("vecchia.toml: knobs.leaf_size: expected an integer in "
                               "[1, 64], got 0")
