"""``covaudit evaluate`` end to end on real files, and its bad-input errors."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import scipy.stats

from harness.cli import main
from harness.model.kernels import Matern32


@pytest.fixture
def datafile(plane_csv):
    return plane_csv


BASE = ["--coords", "x,y", "--value", "v", "--kernel", "matern32", "--param", "variance=1",
        "--param", "lengthscale=0.1", "--param", "nugget=0.01"]


def test_json_output_keys_and_value(datafile, capsys):
    path, frame = datafile
    assert main(["evaluate", str(path), *BASE, "--json", "--fisher"]) == 0
    out = json.loads(capsys.readouterr().out)
    for key in ("n", "kernel", "params", "solver", "loglik", "logdet", "quadratic", "score",
                "fisher", "certificate", "seconds", "seconds_assemble", "seconds_factor"):
        assert key in out
    assert set(out["score"]) == {"log_variance", "log_lengthscale", "log_nugget"}
    # Source: scipy.stats.multivariate_normal.logpdf of the same model.
    pts = frame[["x", "y"]].to_numpy()
    sigma = Matern32(1.0, 0.1, 0.01).covariance(pts)
    expected = scipy.stats.multivariate_normal(np.zeros(200), sigma).logpdf(frame["v"])
    assert out["loglik"] == pytest.approx(expected, rel=1e-10)
    assert len(out["fisher"]) == 3 and out["certificate"] < 30


def test_anisotropic_keys(datafile, capsys):
    path, _ = datafile
    args = ["--coords", "x,y", "--value", "v", "--kernel", "matern52", "--param",
            "lengthscale=0.1,0.3", "--param", "nugget=0.01", "--json"]
    assert main(["evaluate", str(path), *args]) == 0
    out = json.loads(capsys.readouterr().out)
    assert list(out["score"]) == ["log_variance", "log_lengthscale_1", "log_lengthscale_2",
                                  "log_nugget"]


def test_readable_summary(datafile, capsys):
    path, _ = datafile
    assert main(["evaluate", str(path), *BASE, "--mean", "linear"]) == 0
    out = capsys.readouterr().out
    assert "loglik" in out and "certificate" in out and "beta" in out


def _error(capsys, argv):
    code = main(argv)
    return code, capsys.readouterr().err


def test_nan_rows_are_named(tmp_path, capsys):
    path = tmp_path / "nan.csv"
    pd.DataFrame({"x": [0.1, np.nan, 0.3, 0.4], "y": [0, 1, 2, 3.0],
                  "v": [1, 2, np.inf, 4.0]}).to_csv(path, index=False)
    code, err = _error(capsys, ["evaluate", str(path), *BASE])
    assert code == 2 and "row(s) 2, 3" in err and "--drop-missing" in err


def test_missing_column_lists_columns(datafile, capsys):
    path, _ = datafile
    argv = ["evaluate", str(path), "--coords", "x,z", *BASE[2:]]
    code, err = _error(capsys, argv)
    assert code == 2 and "no column 'z'" in err and "x, y, v" in err


def test_unknown_kernel_lists_known(datafile, capsys):
    path, _ = datafile
    argv = ["evaluate", str(path), "--coords", "x,y", "--value", "v", "--kernel", "matern",
            "--param", "lengthscale=0.1"]
    code, err = _error(capsys, argv)
    assert code == 2 and "'nu' is required" in err
    argv[7] = "maternn"
    code, err = _error(capsys, argv)
    assert code == 2 and "known kernels" in err


@pytest.mark.parametrize("param, message", [("variance=-1", "variance must be"),
                                            ("lengthscale=0", "lengthscale must be"),
                                            ("lengthscale=abc", "not a number")])
def test_bad_parameters(datafile, capsys, param, message):
    path, _ = datafile
    argv = ["evaluate", str(path), "--coords", "x,y", "--value", "v", "--kernel", "matern32",
            "--param", param]
    if not param.startswith("lengthscale"):
        argv += ["--param", "lengthscale=0.1"]
    code, err = _error(capsys, argv)
    assert code == 2 and message in err


def test_duplicates_with_zero_nugget(tmp_path, capsys):
    path = tmp_path / "dup.csv"
    pd.DataFrame({"x": [0.1, 0.1, 0.5], "y": [0.2, 0.2, 0.5], "v": [1.0, 2.0, 3.0]}).to_csv(
        path, index=False)
    argv = ["evaluate", str(path), "--coords", "x,y", "--value", "v", "--kernel", "matern32",
            "--param", "lengthscale=0.1"]
    code, err = _error(capsys, argv)
    assert code == 2 and "duplicate" in err and "nugget" in err


def test_empty_and_wrong_type_files(tmp_path, capsys):
    empty = tmp_path / "empty.csv"
    empty.write_text("")
    code, err = _error(capsys, ["evaluate", str(empty), *BASE])
    assert code == 2 and "empty" in err
    other = tmp_path / "obs.xlsx"
    other.write_text("x")
    code, err = _error(capsys, ["evaluate", str(other), *BASE])
    assert code == 2 and "unrecognised file type" in err


def test_structured_references_agree_with_dense_through_the_cli(tmp_path, capsys):
    # The Kalman (Hartikainen and Sarkka 2010) and Kronecker references against the
    # certified dense Cholesky on the same files, through the command line.
    rng = np.random.default_rng(8)
    line = tmp_path / "line.csv"
    pd.DataFrame({"t": np.sort(rng.random(400)), "v": rng.standard_normal(400)}).to_csv(
        line, index=False)
    grid = tmp_path / "grid.csv"
    gx, gy = np.meshgrid(np.linspace(0, 1, 12), np.linspace(0, 1, 15), indexing="ij")
    pd.DataFrame({"x": gx.ravel(), "y": gy.ravel(), "v": rng.standard_normal(180)}).to_csv(
        grid, index=False)
    runs = {
        "statespace": [str(line), "--coords", "t", "--param", "lengthscale=0.05"],
        "kronecker": [str(grid), "--coords", "x,y", "--param", "lengthscale=0.2,0.3",
                      "--separable"],
    }
    for solver, args in runs.items():
        results = []
        for name in ("dense", solver):
            argv = ["evaluate", *args, "--value", "v", "--kernel", "matern32", "--param",
                    "nugget=0.1", "--mean", "constant", "--solver", name, "--json"]
            assert main(argv) == 0
            results.append(json.loads(capsys.readouterr().out))
        assert results[1]["loglik"] == pytest.approx(results[0]["loglik"], rel=1e-9)
        for key, value in results[0]["score"].items():
            assert results[1]["score"][key] == pytest.approx(value, rel=1e-5, abs=1e-6)


def test_kronecker_needs_a_grid_and_separable(datafile, capsys):
    path, _ = datafile
    argv = ["evaluate", str(path), *BASE, "--solver", "kronecker"]
    code, err = _error(capsys, argv)
    assert code == 2 and "--separable" in err
    code, err = _error(capsys, argv + ["--separable"])
    assert code == 2 and "do not form a tensor grid" in err
    code, err = _error(capsys, ["evaluate", str(path), *BASE, "--solver", "statespace"])
    assert code == 2 and "1-dimensional" in err


def test_hodlr_and_plugin_through_the_cli(datafile, capsys, monkeypatch):
    # The compressed solver at a tight tolerance reproduces the certified dense value
    # (tolerance-to-error relation of the built-in HODLR solver, README "What the tolerance
    # means"; common practice 1e-10 -> ~1e-8 rel).
    path, _ = datafile
    assert main(["evaluate", str(path), *BASE, "--json"]) == 0
    dense = json.loads(capsys.readouterr().out)
    assert main(["evaluate", str(path), *BASE, "--json", "--solver", "hodlr", "--tol", "1e-10",
                 "--leaf-size", "32", "--trace", "hutchinson", "--probes", "16"]) == 0
    hodlr = json.loads(capsys.readouterr().out)
    assert hodlr["loglik"] == pytest.approx(dense["loglik"], rel=1e-8)
    for key in ("tol", "trace", "nbytes", "ranks", "seconds_factor", "seconds_logdet",
                "seconds_solve", "seconds_score"):
        assert key in hodlr
    assert hodlr["trace"]["method"] == "hutchinson" and hodlr["trace"]["probes"] == 16
    assert set(hodlr["trace"]["stderr"]) == set(dense["score"])
    examples = Path(__file__).resolve().parents[1] / "examples" / "jittered_solver"
    monkeypatch.syspath_prepend(str(examples))
    assert main(["evaluate", str(path), *BASE, "--json", "--solver",
                 "jittered_solver:factorize", "--tol", "1e-12", "--trace", "exact"]) == 0
    plugin = json.loads(capsys.readouterr().out)
    assert plugin["loglik"] == pytest.approx(dense["loglik"], rel=1e-6)
    assert any("supplied generically" in note for note in plugin["notes"])
    code, err = _error(capsys, ["evaluate", str(path), *BASE, "--solver", "nosuch"])
    assert code == 2 and "known solvers" in err


# -- --solver operator (the exact-operator reference) ---------------------------------------

OPERATOR_KEYS = ("loglik", "loglik_se", "logdet", "logdet_se", "quadratic", "quadratic_bound",
                 "score", "score_se", "iterations", "products", "seconds")


def test_operator_json_keys_and_agreement_with_dense(datafile, capsys):
    # Source: the dense reference through the same CLI (certified Cholesky).
    path, _ = datafile
    assert main(["evaluate", str(path), *BASE, "--json"]) == 0
    dense = json.loads(capsys.readouterr().out)
    assert main(["evaluate", str(path), *BASE, "--json", "--solver", "operator",
                 "--preconditioner-tol", "1e-6", "--probes", "32"]) == 0
    out = json.loads(capsys.readouterr().out)
    for key in OPERATOR_KEYS:
        assert key in out, key
    assert out["solver"] == "operator" and out["converged"] is True
    assert abs(out["loglik"] - dense["loglik"]) <= max(3 * out["loglik_se"], 1e-6)
    assert abs(out["quadratic"] - dense["quadratic"]) <= out["quadratic_bound"] + 1e-10 * abs(
        dense["quadratic"])
    assert set(out["score_se"]) == set(dense["score"])
    for name, value in out["score"].items():
        assert abs(value - dense["score"][name]) <= 4 * out["score_se"][name] + 1e-6
    assert out["preconditioner"]["name"] == "hodlr" and out["bound_kind"] == "residual/nugget"


def test_operator_readable_summary_and_preconditioner_spec(datafile, capsys):
    path, _ = datafile
    assert main(["evaluate", str(path), *BASE, "--solver", "operator", "--preconditioner",
                 "dense"]) == 0
    out = capsys.readouterr().out
    assert "SE" in out and "quadratic bound" in out and "converged True" in out


def test_operator_unresolved_exit_code_and_message(datafile, capsys):
    # An SE target that cannot be reached within the probe budget: exit 1, "unresolved".
    path, _ = datafile
    code = main(["evaluate", str(path), *BASE, "--json", "--solver", "operator",
                 "--preconditioner-tol", "1e-2", "--probes", "8", "--se-target", "1e-9"])
    captured = capsys.readouterr()
    assert code == 1 and "unresolved" in captured.err and "se_target" in captured.err
    assert json.loads(captured.out)["converged"] is False


def test_operator_option_errors(datafile, capsys):
    path, _ = datafile
    code, err = _error(capsys, ["evaluate", str(path), *BASE, "--solver", "operator",
                                "--fisher"])
    assert code == 2 and "--fisher" in err
    code, err = _error(capsys, ["evaluate", str(path), *BASE, "--solver", "operator",
                                "--preconditioner", "nosuchsolver"])
    assert code == 2 and "--preconditioner" in err and "known solvers" in err
    code, err = _error(capsys, ["evaluate", str(path), *BASE, "--dask-local", "2"])
    assert code == 2 and "--solver operator" in err


def test_operator_on_a_local_dask_cluster(datafile, capsys):
    pytest.importorskip("distributed")  # the dask extra, as in the other Dask tests
    path, _ = datafile
    assert main(["evaluate", str(path), *BASE, "--json", "--solver", "operator",
                 "--no-score"]) == 0
    serial = json.loads(capsys.readouterr().out)
    assert main(["evaluate", str(path), *BASE, "--json", "--solver", "operator",
                 "--no-score", "--dask-local", "2"]) == 0
    remote = json.loads(capsys.readouterr().out)
    assert remote["dask"] == "local"
    assert remote["loglik"] == pytest.approx(serial["loglik"], rel=1e-12)
