"""The Rauch-Tung-Striebel smoother as the kriging reference on a line (issue 22, item 4),
and ``check``'s kriging options end to end (items 2, 5, 6)."""

from __future__ import annotations

import argparse
import json

import numpy as np
import pandas as pd
import pytest
import sklearn.gaussian_process as gp
import sklearn.gaussian_process.kernels as sk

from harness.cli import check_command as check_cli
from harness.infra.exit_codes import ExitCode
from harness.model.kernels import make_kernel
from harness.references import DenseCholesky
from harness.references.dense_reference import dense_kriging
from harness.references.statespace import StateSpaceError
from harness.references.statespace_kriging import smoother_kriging

NU = {"exponential": 0.5, "matern32": 1.5}
PARAMS = {"variance": 1.7, "lengthscale": 0.4, "nugget": 0.04}


@pytest.fixture(scope="module")
def line():
    rng = np.random.default_rng(12)
    x = rng.uniform(0.0, 10.0, 500)
    y = np.cos(x) + 0.2 * rng.standard_normal(500)
    new = np.concatenate([rng.uniform(-1.0, 11.0, 60), x[:4]])   # outside, between, on
    return x, y, new


@pytest.mark.parametrize("family", sorted(NU))
def test_smoother_equals_sklearn_gaussian_process(line, family):
    # Source: scikit-learn GaussianProcessRegressor.predict (zero mean, fixed kernel); its
    # std includes the WhiteKernel noise, so it is compared with v* + tau2.
    x, y, new = line
    kernel = make_kernel(family, PARAMS)
    skl = (sk.ConstantKernel(PARAMS["variance"])
           * sk.Matern(length_scale=PARAMS["lengthscale"], nu=NU[family])
           + sk.WhiteKernel(PARAMS["nugget"]))
    reg = gp.GaussianProcessRegressor(skl, alpha=0.0, optimizer=None).fit(x[:, None], y)
    mean, std = reg.predict(new[:, None], return_std=True)
    got = smoother_kriging(x, y, kernel, new, mean="zero")
    np.testing.assert_allclose(got.mean, mean, rtol=0, atol=1e-9)
    np.testing.assert_allclose(got.variance + PARAMS["nugget"], std ** 2, rtol=0, atol=1e-9)


@pytest.mark.parametrize("family", sorted(NU))
@pytest.mark.parametrize("mean", ["constant", "linear"])
def test_smoother_equals_the_dense_universal_kriging(line, family, mean):
    # Source: Cressie 1993 eqs. 3.4.60-3.4.61 by the dense Cholesky (dense_kriging).
    x, y, new = line
    kernel = make_kernel(family, PARAMS)
    dense = dense_kriging(x[:, None], y + 3.0, kernel, new[:, None], mean=mean)
    got = smoother_kriging(x, y + 3.0, kernel, new, mean=mean)
    np.testing.assert_allclose(got.mean, dense.mean, rtol=0, atol=1e-9)
    np.testing.assert_allclose(got.variance, dense.variance, rtol=0, atol=1e-9)
    np.testing.assert_allclose(got.beta, dense.beta, rtol=1e-9)


def test_smoother_refuses_points_off_a_line():
    kernel = make_kernel("matern32", PARAMS)
    with pytest.raises(StateSpaceError, match="new points"):
        smoother_kriging(np.arange(5.0), np.ones(5), kernel, np.ones((3, 2)))
    with pytest.raises(StateSpaceError, match="y: expected 5 values"):
        smoother_kriging(np.arange(5.0), np.ones(4), kernel, np.ones(3))


# -- check end to end: the reference of each metric, the counts, the errors ---------------

def _run(argv: list[str]) -> int:
    parser = argparse.ArgumentParser()
    sub = parser.add_subparsers(dest="verb")
    check_cli.add_parser(sub)
    return check_cli.run(parser.parse_args(["check", *argv]))


def _line_file(tmp_path, n=300):
    rng = np.random.default_rng(5)
    x = np.sort(rng.uniform(0, 30, n))
    k = make_kernel("matern32", {"variance": 1.0, "lengthscale": 2.0, "nugget": 0.1})
    v = DenseCholesky(x[:, None], k).apply_sqrt(rng.standard_normal(n))
    path = tmp_path / "line.csv"
    pd.DataFrame({"t": x, "z": v}).to_csv(path, index=False)
    return path


def _plane_file(tmp_path, n=150):
    rng = np.random.default_rng(6)
    x = rng.uniform(0, 10, (n, 2))
    k = make_kernel("matern32", {"variance": 1.0, "lengthscale": 2.0, "nugget": 0.1})
    v = DenseCholesky(x, k).apply_sqrt(rng.standard_normal(n))
    path = tmp_path / "plane.csv"
    pd.DataFrame({"e": x[:, 0], "n": x[:, 1], "z": v}).to_csv(path, index=False)
    return path


FIXED = ["--params", "variance=1.0", "lengthscale=2.0", "nugget=0.1"]


def test_check_on_a_line_beyond_the_budget_krige_by_the_smoother(tmp_path, capsys):
    # Beyond the dense reference (asked for directly: a budget below the dense reference
    # at n this small is below the plan's peak too, tests/test_check_plan.py), the Kalman
    # filter serves the likelihood and its RTS smoother kriging; the caps are recorded.
    path = _line_file(tmp_path)
    code = _run([str(path), "--coords", "t", "--value", "z", "--tolerances", "1e-8",
                 *FIXED, "--reference", "statespace", "--solver-seeds", "1", "--json",
                 "--holdout", "0.2", "--holdout-points", "40", "--variance-points", "9",
                 "--out", str(tmp_path / "o"), "--no-refit"])
    result = json.loads(capsys.readouterr().out)
    assert code in (ExitCode.OK, ExitCode.FINDING)
    assert result["reference"] == "statespace"
    assert result["n_holdout"] == 40 and result["n_variance_points"] == 9
    by_metric = result["reference_by_metric"]
    assert by_metric["loglik"]["kind"] == by_metric["score"]["kind"] == "statespace"
    assert by_metric["kriging"]["kind"] == "statespace"
    assert by_metric["kriging"]["n_holdout"] == 40
    assert by_metric["kriging"]["n_variance_points"] == 9
    assert result["reference_detail"]["kind"] == "statespace"
    (row,) = result["tolerances"]
    assert row["kriging_mean_sd"]["value"] < 0.05       # the solver at 1e-8 on 300 points
    assert "40 held-out points" in row["kriging_mean_sd"]["note"]
    assert "Kalman filter" in row["loglik_error"]["note"]   # not "the exact operator"
    assert result["holdout"]["points"] == 40 and result["holdout"]["variance_points"] == 9


def test_check_caps_default_fraction_and_variance_points(tmp_path, capsys):
    # Source: issue 22's caps: min(fraction n, --holdout-points); variances at at most
    # --variance-points of them (here above the holdout: every held-out point).
    path = _line_file(tmp_path)
    code = _run([str(path), "--coords", "t", "--value", "z", "--tolerances", "1e-8",
                 *FIXED, "--solver-seeds", "1", "--json", "--reference", "dense",
                 "--variance-points", "500", "--out", str(tmp_path / "o"), "--no-refit"])
    result = json.loads(capsys.readouterr().out)
    assert code in (ExitCode.OK, ExitCode.FINDING)
    assert result["n_holdout"] == 30 and result["n_variance_points"] == 30
    assert result["reference_by_metric"]["kriging"]["kind"] == "dense"


@pytest.mark.parametrize(("flags", "message"), [
    (["--holdout-points", "0"], "--holdout-points: expected an integer >= 1, got 0"),
    (["--holdout-points", "300"], "--holdout-points: expected fewer held-out points than "
                                  "the 300 data points, got 300"),
    (["--variance-points", "0"], "--variance-points: expected an integer >= 1, got 0"),
    (["--holdout", "0"], "--holdout:"),
])
def test_check_holdout_errors_exit_2_in_one_line(tmp_path, capsys, flags, message):
    path = _line_file(tmp_path)
    argv = [str(path), "--coords", "t", "--value", "z", *FIXED, "--no-refit",
            "--out", str(tmp_path / "o"), *flags]
    try:
        code = _run(argv)
    except SystemExit as exc:      # argparse: the option's type refused the value
        code = exc.code
    err = capsys.readouterr().err.strip().splitlines()
    assert code == ExitCode.ERROR
    assert any(message in line for line in err), err
    assert not (tmp_path / "o" / "check.json").exists()


def test_check_in_the_plane_beyond_the_budget_krige_by_the_operator(tmp_path, capsys):
    # In 2D the exact operator serves every metric, kriging included,
    # at the capped counts (issue 22, items 2 and 5).
    path = _plane_file(tmp_path)
    code = _run([str(path), "--coords", "e,n", "--value", "z", "--tolerances", "1e-8",
                 *FIXED, "--reference", "operator", "--solver-seeds", "1", "--json",
                 "--holdout-points", "12", "--variance-points", "5",
                 "--out", str(tmp_path / "o"), "--no-refit"])
    result = json.loads(capsys.readouterr().out)
    assert code in (ExitCode.OK, ExitCode.FINDING)
    assert result["reference"] == "operator"
    assert result["n_holdout"] == 12 and result["n_variance_points"] == 5
    by_metric = result["reference_by_metric"]
    assert {name: e["kind"] for name, e in by_metric.items()} == {
        "loglik": "operator", "score": "operator", "kriging": "operator"}
    assert by_metric["kriging"]["n_variance_points"] == 5
    (row,) = result["tolerances"]
    note = row["kriging_mean_sd"]["note"]
    assert "12 held-out points" in note and "5 with their own variance" in note
    assert "5 variance points" in row["kriging_var_ratio"]["note"]
