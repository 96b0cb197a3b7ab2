"""The pieces of the knob wiring below the verbs: the knob's option specification, the
recommendation along a knob whose large end is tight, the task's knob fields and hashes,
the stored rows of records written before the knob, and the engine's JSON form.

Expected values are the declarations themselves (``harness.solvers.knobs``, a radius
knob declared as the Vecchia solver declares rho) and the rule of DEVELOPERS.md, "The
verdict rule"; no numeric result is computed here. The verbs' tests read the knob the
Vecchia solver declares, whatever its name.
"""

from __future__ import annotations

import argparse
import math
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest

from harness.analysis.regression import _task_label
from harness.analysis.scaling_table import solver_label
from harness.audit.engine import ToleranceAudit
from harness.audit.rule import SAFE, UNSAFE, ReferenceInfo, recommend, tolerance_verdict
from harness.cli import check_command, evaluate_command
from harness.grid.store.tables import result_row, timings_frame
from harness.grid.tasks import PointSetSpec, Task
from harness.infra.exit_codes import ExitCode
from harness.infra.option_specs import OptionError, knob_option
from harness.solvers.knobs import DEFAULT_TOL_KNOB, KnobSpec
from harness.solvers.registry import resolve_solver

#: A radius knob as the Vecchia solver declares its rho (harness/solvers/vecchia/):
#: [1, inf], larger is more accurate.
RHO_KNOB = KnobSpec(name="rho", kind="float", low=1.0, high=math.inf, low_closed=True,
                    high_closed=True, more_accurate="larger",
                    default_sweep=(2.5, 4.0, 6.0, 9.0))
INT_KNOB = KnobSpec(name="m", kind="int", low=1, high=500, low_closed=True, high_closed=True,
                    more_accurate="larger", default_sweep=(5, 10, 20))


# -- the knob as an option specification -------------------------------------------------
def test_rho_values_are_checked_against_its_declared_range_with_the_range_shown():
    spec = RHO_KNOB.option_spec()
    assert spec.parse_list("2.5, 6,inf", where="--knob-values") == (2.5, 6.0, math.inf)
    for bad in ("0.5", "nan", "-inf", "six"):
        with pytest.raises(OptionError) as info:
            spec.parse_list(f"2.5,{bad}", where="--knob-values")
        message = str(info.value)
        assert message.startswith("--knob-values: expected rho")
        assert RHO_KNOB.range_text() in message and "\n" not in message


def test_open_ends_and_integer_knobs_refuse_their_edges():
    tol = DEFAULT_TOL_KNOB.option_spec()
    assert tol.problem(1e-6) is None
    assert tol.problem(0.0) is not None and tol.problem(1.0) is not None   # (0, 1)
    spec = INT_KNOB.option_spec()
    assert spec.problem(20) is None and spec.problem(1) is None and spec.problem(500) is None
    assert "an integer in [1, 500]" in (spec.problem(2.5) or "")
    assert spec.problem(501) is not None and spec.problem(True) is not None


def test_the_core_message_is_the_same_from_every_source():
    spec = knob_option("rho", kind=float, low=1.0, high=math.inf, low_closed=True,
                       high_closed=True, default=(2.5,), help="radius")
    with pytest.raises(OptionError) as info:
        spec.validate(0.5, where="case.toml: solvers[1].knob_values[0]")
    assert str(info.value) == ("case.toml: solvers[1].knob_values[0]: expected rho as a "
                               "number in [1, inf], got 0.5")


def test_arguments_follow_the_protocol():
    # factorize(points, kernel, theta, *, tol, **options): another knob is an option
    assert RHO_KNOB.arguments(6) == {"tol": None, "rho": 6.0}
    assert DEFAULT_TOL_KNOB.arguments(1e-6) == {"tol": 1e-6}
    assert RHO_KNOB.arguments(None) == {"tol": None}           # an exact solver
    assert RHO_KNOB.sorted_loose_to_tight([9, 2.5, 6, 2.5]) == (2.5, 6.0, 9.0)
    assert DEFAULT_TOL_KNOB.sorted_loose_to_tight([1e-8, 1e-2]) == (1e-2, 1e-8)


# -- the recommendation along rho ------------------------------------------------------------
def test_recommendation_when_larger_is_more_accurate():
    # the rule (DEVELOPERS.md): the loosest safe value with every tighter one safe; for
    # rho the tight end is the large one
    rec = recommend({2.5: UNSAFE, 4.0: SAFE, 9.0: SAFE}, more_accurate="larger", knob="rho")
    assert rec.tol == 4.0 and rec.monotone
    assert "rho value" in rec.reason and "tolerance" not in rec.reason
    stray = recommend({2.5: SAFE, 4.0: UNSAFE, 9.0: SAFE}, more_accurate="larger",
                      knob="rho")
    assert stray.tol == 9.0 and not stray.monotone and stray.non_monotone == (2.5,)
    none = recommend({2.5: SAFE, 9.0: UNSAFE}, more_accurate="larger", knob="rho")
    assert none.tol is None and "the tightest, 9, is unsafe" in none.reason
    # a tol ladder reads as before
    assert recommend({1e-2: UNSAFE, 1e-6: SAFE}).tol == 1e-6
    with pytest.raises(ValueError, match="more_accurate"):
        recommend({1.0: SAFE}, more_accurate="bigger")


def test_engine_json_of_a_rho_value_leaves_tol_empty():
    verdict = tolerance_verdict(6.0, [[]], reference=ReferenceInfo("dense", True, "dense"))
    audit = ToleranceAudit(verdict=verdict, seeds=(), seconds=1.0, speedup=None, nbytes=0,
                           knob_name="rho")
    out = audit.to_dict("dense")
    assert (out["tol"], out["knob_name"], out["knob_value"]) == (None, "rho", 6.0)
    tol_audit = ToleranceAudit(verdict=tolerance_verdict(
        1e-6, [[]], reference=ReferenceInfo("dense", True, "dense")), seeds=(), seconds=1.0,
        speedup=None, nbytes=0)
    assert tol_audit.to_dict("dense")["tol"] == tol_audit.to_dict("dense")["knob_value"]


# -- tasks, hashes and stored rows -----------------------------------------------------------
def _task(**changes: object) -> Task:
    base: dict[str, object] = dict(
        case="c", pointset=PointSetSpec(name="uniform", generator="uniform"), n=100, d=2,
        kernel="matern32", kernel_params={"lengthscale": 0.2, "nugget": 1e-3},
        separable=False, mean="zero", reml=False, solver="hodlr", solver_version="1",
        solver_options={}, tol=1e-4, seed=0)
    return Task(**(base | changes))  # type: ignore[arg-type]


def test_a_tol_task_hashes_as_before_the_knob_and_mirrors_tol():
    before = _task().to_dict()
    for name in ("knob_name", "knob_value"):
        before.pop(name)
    old = Task.from_dict(before)                  # a record written before the knob
    assert (old.knob_name, old.knob_value) == ("tol", 1e-4)
    assert old.key == _task().key and old.pair_key == _task().pair_key
    assert "knob_name" not in _task().canonical()


def test_a_rho_task_hashes_its_knob_and_names_it():
    low, high = (_task(solver="vecchia", tol=None, knob_name="rho", knob_value=v)
                 for v in (2.5, 6.0))
    assert low.key != high.key and low.pair_key != high.pair_key
    assert "vecchia@rho2.5" in low.label
    assert Task.from_dict(low.to_dict()) == low


def test_stored_rows_carry_the_knob_columns():
    old = _task().to_dict()
    old.pop("knob_name")
    old.pop("knob_value")
    record = {"key": "k", "label": "l", "status": "ok", "task": old,
              "timing": {"phases": {"factor": {"samples": [0.5]}}}}
    row = result_row(record)
    assert (row["tol"], row["knob_name"], row["knob_value"]) == (1e-4, "tol", 1e-4)
    rho = _task(solver="vecchia", tol=None, knob_name="rho", knob_value=6.0).to_dict()
    row = result_row(record | {"task": rho})
    assert (row["tol"], row["knob_name"], row["knob_value"]) == (None, "rho", 6.0)
    frame = timings_frame([record | {"task": rho}])
    assert list(frame[["tol", "knob_name", "knob_value"]].iloc[0]) == [None, "rho", 6.0]


def test_scaling_labels_name_the_knob():
    assert solver_label("vecchia", math.nan, knob_name="rho", knob_value=6.0) == \
        "vecchia rho=6"
    assert solver_label("hodlr", 1e-6, knob_name="tol", knob_value=1e-6) == \
        "hodlr tol=1e-06"
    assert solver_label("dense", math.nan) == "dense"


# -- refusals of the verbs that the knob adds -----------------------------------------------
def _verb(module: Any, argv: list[str]) -> int:
    parser = argparse.ArgumentParser()
    module.add_parser(parser.add_subparsers(dest="verb"))
    return int(module.run(parser.parse_args(argv)))


@pytest.fixture(scope="module")
def small_file(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """120 points with white-noise values (only the refusals are tested here)."""
    rng = np.random.default_rng(3)
    path = tmp_path_factory.mktemp("knob") / "small.csv"
    x = rng.uniform(0, 1, (120, 2))
    pd.DataFrame({"x": x[:, 0], "y": x[:, 1], "z": rng.standard_normal(120)}).to_csv(
        path, index=False)
    return path


def test_evaluate_refuses_tol_for_a_rho_solver_in_one_line(small_file: Path,
                                                           capsys: pytest.CaptureFixture[str]
                                                           ) -> None:
    code = _verb(evaluate_command, ["evaluate", str(small_file), "--coords", "x,y",
                                    "--value", "z", "--kernel", "matern32", "--param",
                                    "lengthscale=0.2", "--solver", "vecchia", "--tol",
                                    "1e-4"])
    err = capsys.readouterr().err.strip()
    knob = resolve_solver("vecchia").knob          # whatever the solver declares
    assert code == ExitCode.ERROR and len(err.splitlines()) == 1
    assert "--tol" in err and knob.name in err and knob.range_text() in err


def test_check_refuses_the_ladder_reference_for_a_rho_solver(small_file: Path,
                                                             tmp_path: Path,
                                                             capsys: pytest.CaptureFixture[str]
                                                             ) -> None:
    # the ladder is the solver at tol / factor: a solver without tol has no ladder
    out = tmp_path / "out"
    code = _verb(check_command, ["check", str(small_file), "--coords", "x,y", "--value",
                                 "z", "--solver", "vecchia", "--knob-values", "3",
                                 "--params", "variance=1", "lengthscale=0.2",
                                 "nugget=0.1", "--reference", "ladder", "--out", str(out)])
    err = capsys.readouterr().err.strip()
    assert code == ExitCode.ERROR and len(err.splitlines()) == 1
    assert "ladder" in err and resolve_solver("vecchia").knob.name in err
    assert not out.exists()


def test_compare_names_a_task_by_its_knob():
    row = pd.Series({"case": "c", "solver": "vecchia", "tol": math.nan, "knob_name": "rho",
                     "knob_value": 6.0, "n": 250.0, "seed": 0.0})
    assert _task_label(row) == "c: vecchia rho=6 n=250 seed=0"
    tol_row = row.copy()
    tol_row[["solver", "tol", "knob_name", "knob_value"]] = ["hodlr", 1e-6, "tol", 1e-6]
    assert _task_label(tol_row) == "c: hodlr tol=1e-06 n=250 seed=0"
