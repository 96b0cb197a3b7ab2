"""A solver's accuracy knob on the command line, in case files and in stored rows.

The knob is declared by the factory (``harness.solvers.knobs``): HODLR's ``tol``, the
Vecchia solver's own knob (larger is more accurate). The tests read the Vecchia
declaration (name, range, default sweep) instead of copying it, and hold the contract of
DEVELOPERS.md, "How to add a solver plugin": the refusals (one line with the range, exit
2), the check's and the run's knob columns, the case-file errors, and that stored ``tol``
runs keep their keys.
"""

from __future__ import annotations

import argparse
import json
import math
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from harness.analysis.load import load_run
from harness.analysis.scaling_table import scaling_rows
from harness.audit.verdict import judge
from harness.cli import check_command as check_cli
from harness.cli import evaluate_command as evaluate_cli
from harness.cli import run_command as run_cli
from harness.grid.cases import CaseFileError, case_from_text
from harness.grid.cases.shipped import shipped_case_text
from harness.grid.store.columns import RESULT_COLUMNS
from harness.infra.exit_codes import ExitCode
from harness.model.kernels import make_kernel
from harness.references import DenseCholesky
from harness.report.run_report import render_report
from harness.solvers.registry import resolve_solver

REPO = Path(__file__).resolve().parents[1]
OLD_RUN = REPO / "tests" / "fixtures" / "run_v0_1_smoke"
TOL_RANGE = "(0, 1)"            # harness.solvers.knobs.DEFAULT_TOL_KNOB
#: The Vecchia solver's declared knob, and three values of its sweep, loose to tight.
KNOB = resolve_solver("vecchia").knob
NAME, RANGE = KNOB.name, KNOB.range_text()
LOOSE, MID, TIGHT = KNOB.default_sweep[0], KNOB.default_sweep[1], KNOB.default_sweep[-1]
TOO_LOW = KNOB.low - 0.5        # below the declared range's lower end


def _verb(module, argv: list[str]) -> int:
    parser = argparse.ArgumentParser()
    sub = parser.add_subparsers(dest="verb")
    module.add_parser(sub)
    return module.run(parser.parse_args(argv))


@pytest.fixture(scope="module")
def field_file(tmp_path_factory) -> Path:
    """200 points of a Matern 3/2 field with a nugget, drawn through the dense factor."""
    rng = np.random.default_rng(5)
    x = rng.uniform(0, 10, (200, 2))
    kernel = make_kernel("matern32", {"variance": 1.0, "lengthscale": 2.0, "nugget": 0.1})
    z = 3 + DenseCholesky(x, kernel).apply_sqrt(rng.standard_normal(200))
    path = tmp_path_factory.mktemp("field") / "field.csv"
    pd.DataFrame({"e": x[:, 0], "n": x[:, 1], "z": z}).to_csv(path, index=False)
    return path


# -- the declarations the wiring reads -----------------------------------------------------
def test_declared_knobs_of_the_built_in_solvers():
    # the declarations themselves (harness/solvers/vecchia/factorization.py, hodlr/)
    hodlr = resolve_solver("hodlr").knob
    assert NAME != "tol" and KNOB.more_accurate == "larger"
    assert (hodlr.name, hodlr.range_text(), hodlr.more_accurate) == ("tol", TOL_RANGE,
                                                                     "smaller")
    assert KNOB.arguments(MID) == {"tol": None, NAME: MID}   # the protocol's convention
    assert hodlr.arguments(1e-6) == {"tol": 1e-6}


# -- the command line ----------------------------------------------------------------------
@pytest.mark.parametrize("argv,expected", [
    (["--solver", "vecchia", "--knob-values", f"{MID:g},{TOO_LOW:g}"], RANGE),
    (["--solver", "vecchia", "--knob-values", "nan"], RANGE),
    (["--solver", "hodlr", "--knob-values", "1e-4,2"], TOL_RANGE),
    (["--solver", "vecchia", "--tolerances", "1e-4"], "--knob-values"),
    (["--solver", "hodlr", "--tolerances", "1e-4", "--knob-values", "1e-6"], "not both"),
])
def test_check_refuses_bad_knob_values_in_one_line_exit_2(argv, expected, field_file,
                                                          tmp_path, capsys):
    out = tmp_path / "out"
    code = _verb(check_cli, ["check", str(field_file), "--coords", "e,n", "--value", "z",
                             *argv, "--out", str(out)])
    err = capsys.readouterr().err.strip()
    assert code == ExitCode.ERROR == 2
    assert len(err.splitlines()) == 1 and expected in err, err
    assert not out.exists()


def test_evaluate_refuses_an_out_of_range_knob_value(field_file, capsys):
    code = _verb(evaluate_cli, ["evaluate", str(field_file), "--coords", "e,n", "--value",
                                "z", "--kernel", "matern32", "--solver", "vecchia",
                                "--param", "lengthscale=2",
                                "--param", "nugget=0.1", "--knob-value", f"{TOO_LOW:g}"])
    err = capsys.readouterr().err.strip()
    assert code == ExitCode.ERROR
    assert len(err.splitlines()) == 1 and RANGE in err and NAME in err, err


def test_check_sweeps_the_knob_of_the_vecchia_solver(field_file, tmp_path, capsys):
    out = tmp_path / "out"
    code = _verb(check_cli, ["check", str(field_file), "--coords", "e,n", "--value", "z",
                             "--solver", "vecchia", "--knob-values",
                             f"{TIGHT:g},{LOOSE:g},{MID:g}",
                             "--reference", "dense", "--no-refit", "--json",
                             "--out", str(out)])
    result = json.loads(capsys.readouterr().out)
    assert code in (ExitCode.OK, ExitCode.FINDING)
    rows = result["tolerances"]
    assert [r["knob_value"] for r in rows] == [LOOSE, MID, TIGHT]     # loose to tight
    assert {r["knob_name"] for r in rows} == {NAME}
    assert all(r["tol"] is None for r in rows)
    assert result["recommended_tolerance"] is None        # the knob is not tol
    picked = result["recommended_knob"]
    if code == ExitCode.OK:
        assert picked == {"solver": "vecchia", "name": NAME, "value": picked["value"]}
        assert picked["value"] in (LOOSE, MID, TIGHT)
    else:
        assert picked is None
    # the error of the Vecchia likelihood falls as the conditioning sets grow (Schafer,
    # Katzfuss and Owhadi 2021, SIAM J. Sci. Comput., Thm. 3.4: the KL error decays
    # exponentially in the radius)
    errors = [abs(r["loglik_error"]["value"]) for r in rows]
    assert all(math.isfinite(e) for e in errors) and errors[-1] < errors[0]
    assert json.loads((out / "check.json").read_text())["recommended_knob"] == picked


def test_check_terminal_output_names_the_knob(field_file, tmp_path, capsys):
    code = _verb(check_cli, ["check", str(field_file), "--coords", "e,n", "--value", "z",
                             "--solver", "vecchia", "--knob-values", f"{LOOSE:g}",
                             "--reference", "dense", "--no-refit", "--out",
                             str(tmp_path / "out")])
    text = capsys.readouterr().out
    assert code in (ExitCode.OK, ExitCode.FINDING)
    assert NAME in text and f"tol {LOOSE:g}" not in text
    if code == ExitCode.OK:
        assert f"recommendation: {NAME} = {LOOSE:g}" in text


def test_check_of_a_tol_solver_keeps_tol_and_adds_the_knob(field_file, tmp_path, capsys):
    code = _verb(check_cli, ["check", str(field_file), "--coords", "e,n", "--value", "z",
                             "--knob-values", "1e-3,1e-8", "--reference", "dense",
                             "--no-refit", "--json", "--out", str(tmp_path / "out")])
    result = json.loads(capsys.readouterr().out)
    assert code == ExitCode.OK
    for row in result["tolerances"]:
        assert row["knob_name"] == "tol" and row["knob_value"] == row["tol"]
    assert result["recommended_knob"] == {"solver": "hodlr", "name": "tol",
                                          "value": result["recommended_tolerance"]}


# -- case files ----------------------------------------------------------------------------
CASE = """
name = "knobs"
[[pointsets]]
generator = "uniform"
sizes = [100]
[[kernels]]
family = "matern32"
lengthscale = 0.2
nugget = 1e-3
[[solvers]]
name = "hodlr"
{hodlr}
[[solvers]]
name = "vecchia"
{vecchia}
"""


def _case(tmp_path: Path, *, hodlr: str = "tolerances = [1e-4]", vecchia: str = ""):
    return case_from_text(CASE.format(hodlr=hodlr, vecchia=vecchia), file="knobs.toml",
                          base=tmp_path, default_name="knobs")


def test_case_file_knob_values_become_tasks(tmp_path):
    tasks = _case(tmp_path, hodlr="knob_values = [1e-4, 1e-8]",
                  vecchia=f"knob_values = [{LOOSE:g}, {TIGHT:g}]").tasks()
    got = {(t.solver, t.tol, t.knob_name, t.knob_value) for t in tasks}
    assert got == {("hodlr", 1e-4, "tol", 1e-4), ("hodlr", 1e-8, "tol", 1e-8),
                   ("vecchia", None, NAME, LOOSE), ("vecchia", None, NAME, TIGHT)}
    knob = [t for t in tasks if t.solver == "vecchia"]
    assert knob[0].key != knob[1].key and knob[0].pair_key != knob[1].pair_key


def test_case_file_without_values_uses_the_declared_sweep(tmp_path):
    tasks = _case(tmp_path).tasks()
    sweep = resolve_solver("vecchia").knob.default_sweep
    assert sorted(t.knob_value for t in tasks if t.solver == "vecchia") == sorted(sweep)


@pytest.mark.parametrize("hodlr,vecchia,where,words", [
    ("tolerances = [1e-4]", "tolerances = [1e-4]", "solvers[1]", "knob_values"),
    ("tolerances = [1e-4]\nknob_values = [1e-6]", "", "solvers[0]", "not both"),
    ("tolerances = [1e-4]", f"knob_values = [{TOO_LOW:g}]", "solvers[1].knob_values[0]",
     RANGE),
    ("knob_values = [3]", "", "solvers[0].knob_values[0]", "(0, 1)"),
])
def test_case_file_knob_errors_name_file_and_solver_entry(tmp_path, hodlr, vecchia, where,
                                                          words):
    with pytest.raises(CaseFileError) as info:
        _case(tmp_path, hodlr=hodlr, vecchia=vecchia)
    problems = [str(p) for p in info.value.problems]
    assert len(problems) == 1, problems
    assert problems[0].startswith(f"knobs.toml: {where}") and words in problems[0]


# -- stored tol runs keep their keys -------------------------------------------------------
def test_stored_tol_run_keeps_its_keys_and_pairs():
    # tests/fixtures/run_v0_1_smoke was written before the knob existed: the same case
    # file must give the same task keys (resume finds them) and pair keys (compare pairs)
    stored = pd.read_csv(OLD_RUN / "results.csv")
    info = json.loads((OLD_RUN / "run.json").read_text())
    versions = dict(zip(stored["solver"], stored["solver_version"].astype(str), strict=True))
    case = case_from_text(info["case_text"], file="smoke.toml", base=REPO,
                          default_name="smoke",
                          resolver=lambda name: (name, versions[name]))
    tasks = case.tasks()
    assert len(tasks) == len(stored) == 6
    assert sorted(t.key for t in tasks) == sorted(stored["key"])
    assert sorted(t.pair_key for t in tasks) == sorted(stored["pair_key"])
    assert {t.knob_name for t in tasks if t.tol is not None} == {"tol"}


def test_stored_tol_run_reads_with_knob_columns():
    run = load_run(OLD_RUN)
    hodlr = run.results[run.results["solver"] == "hodlr"]
    assert len(hodlr) == 4 and (hodlr["knob_name"] == "tol").all()
    assert (hodlr["knob_value"] == hodlr["tol"]).all()


# -- a run of both families: the knob columns and the scaling groups ----------------------
def _trimmed_shipped_case() -> str:
    """``cases/hodlr-vecchia.toml`` at tiny sizes, one timing repeat and fewer metrics."""
    text = shipped_case_text("hodlr-vecchia")
    replacements = {"sizes = [250, 500, 1000]": "sizes = [120, 160, 200]",
                    "repeats = 2": "repeats = 1", "warmup = 1": "warmup = 0",
                    'compute = ["loglik", "score", "factorization", "solve", "kriging"]':
                        'compute = ["loglik", "kriging"]'}
    for old, new in replacements.items():
        assert old in text, old           # the trimmed copy follows the shipped file
        text = text.replace(old, new)
    return text


def test_run_of_hodlr_and_vecchia_writes_knob_columns_and_fits_each(tmp_path, capsys):
    case = tmp_path / "hodlr-vecchia.toml"
    case.write_text(_trimmed_shipped_case())
    out = tmp_path / "run"
    assert _verb(run_cli, ["run", str(case), "--out", str(out)]) in (ExitCode.OK,
                                                                    ExitCode.FINDING)
    results = pd.read_csv(out / "results.csv")
    assert len(results) == 3 * (2 + len(KNOB.default_sweep) + 1)
    assert set(results["status"]) == {"ok"}
    vecchia = results[results["solver"] == "vecchia"]
    hodlr = results[results["solver"] == "hodlr"]
    assert (vecchia["knob_name"] == NAME).all() and vecchia["tol"].isna().all()
    assert sorted(set(vecchia["knob_value"])) == sorted(KNOB.default_sweep)
    assert (hodlr["knob_name"] == "tol").all()
    assert (hodlr["knob_value"] == hodlr["tol"]).all() and hodlr["tol"].notna().all()
    # each task ran at its own knob value: at one size the likelihood error differs
    # between the loosest and the tightest (the solver's default would give one value)
    at200 = vecchia[vecchia["n"] == 200].set_index("knob_value")["loglik_abs_err"]
    assert at200[LOOSE] != at200[TIGHT] and at200.notna().all()
    # the KL divergence from the exact Sigma (dense reference) is stored per task and
    # falls as the knob tightens (the KL-minimizing factor's sets are nested: a larger
    # pattern cannot raise the minimum, Schafer, Katzfuss and Owhadi 2021, Thm. 2.1)
    kl200 = vecchia[vecchia["n"] == 200].set_index("knob_value")["kl_nat"]
    assert kl200.notna().all() and (kl200 > 0).all() and kl200[LOOSE] > kl200[TIGHT]
    assert hodlr["kl_nat"].notna().all()
    for path in (out / "tasks").glob("*.json"):
        record = json.loads(path.read_text())
        task, audit = record["task"], record["result"].get("audit")
        assert record["status"] == "ok", record.get("error")
        if task["solver"] == "vecchia":
            expected = (None, NAME, task["knob_value"])
            assert (task["tol"], task["knob_name"]) == expected[:2]
            assert (audit["tol"], audit["knob_name"], audit["knob_value"]) == expected
            solver = record["result"]["solver"]
            assert (solver["tol"], solver["knob_name"], solver["knob_value"]) == expected
    rows = scaling_rows(load_run(out), metrics=("t_factor", "loglik_abs_err"), rng=0)
    groups = {(r.solver, r.knob_name, r.knob_value) for r in rows if r.solver != "dense"}
    assert groups == {("hodlr", "tol", 1e-4), ("hodlr", "tol", 1e-6),
                      *(("vecchia", NAME, v) for v in KNOB.default_sweep)}
    assert all(r.fit is not None for r in rows if r.metric == "t_factor"), [
        r.refused for r in rows]
    verdicts = {(v.solver, v.knob_name, v.knob_value) for v in judge(load_run(out).results)
                .verdicts}
    assert verdicts == groups
    html = render_report(load_run(out))
    assert f"{NAME} = {LOOSE:g}" in html and f"vecchia {NAME}={TIGHT:g}" in html


# -- run-level verdicts per knob value -----------------------------------------------------
def _verdict_rows(specs: list[dict]) -> pd.DataFrame:
    base = {c: np.nan for c in RESULT_COLUMNS}
    base.update(case="c", kernel="matern32", shape="", n=1000.0, d=2.0, geometry="uniform",
                mean="constant", variance=1.0, lengthscale="0.1", nugget=1e-4,
                trace_method="exact", reference="dense", status="ok",
                reference_certificate=0.5, error_type="", error_message="")
    return pd.DataFrame([{**base, **s} for s in specs])


def _vecchia(value: float, err: float, t: float) -> dict:
    return dict(solver="vecchia", tol=np.nan, knob_name=NAME, knob_value=value,
                loglik_abs_err=err, param_shift_se_max=err, kriging_mean_err_sd_max=err / 4,
                t_total=t)


def test_run_verdicts_judge_each_knob_value_and_recommend_the_loosest_safe_one():
    # limits 0.1 nat / 0.1 SE / 0.05 SD (DEVELOPERS.md, "The verdict rule"); for the
    # Vecchia knob the loose end is the small one (larger is more accurate)
    dense = dict(solver="dense", tol=np.nan, t_total=8.0)
    vs = judge(_verdict_rows([_vecchia(LOOSE, 0.5, 1.0), _vecchia(MID, 0.05, 2.0),
                              _vecchia(TIGHT, 1e-4, 4.0), dense]))
    status = {(v.solver, v.knob_name, v.knob_value): (v.status, v.tol) for v in vs.verdicts}
    assert set(status) == {("vecchia", NAME, v) for v in (LOOSE, MID, TIGHT)}  # not dense
    assert [status[("vecchia", NAME, v)][0] for v in (LOOSE, MID, TIGHT)] == [
        "unsafe", "safe", "safe"]
    assert all(math.isnan(tol) for _, tol in status.values())
    (rec,) = vs.recommendations
    assert (rec.knob_name, rec.knob_value) == (NAME, MID) and math.isnan(rec.tol)
    assert rec.speedup == pytest.approx(8.0 / 2.0) and rec.speedup_over == "dense"
