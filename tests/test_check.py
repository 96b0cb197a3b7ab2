"""``covaudit check``: bad input refused with exit code 2 and nothing written; a small
end-to-end run; the loss-of-efficiency criteria in closed form; chordal geometry."""

from __future__ import annotations

import argparse
import json
import math

import numpy as np
import pandas as pd
import pytest

from harness.audit.metrics.efficiency import prediction_efficiency
from harness.cli import check_command as check_cli
from harness.geometry.geodesy import EARTH_RADIUS_KM, chordal_distance, lonlat_to_chordal
from harness.model.kernels import make_kernel
from harness.references import DenseCholesky


def _run(argv: list[str]) -> int:
    parser = argparse.ArgumentParser()
    sub = parser.add_subparsers(dest="verb")
    check_cli.add_parser(sub)
    return check_cli.run(parser.parse_args(["check", *argv]))


def _frame(n: int = 60, seed: int = 0) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    return pd.DataFrame({"x": rng.uniform(0, 1, n), "y": rng.uniform(0, 1, n),
                         "v": rng.normal(size=n)})


BAD_CASES = {
    "missing_column": (lambda f: f, ["--coords", "x,z", "--value", "v"], "columns present"),
    "non_numeric": (lambda f: f.assign(v=["a"] + list(f.v[1:])), ["--coords", "x,y",
                                                                   "--value", "v"],
                    "not numeric"),
    "nan_rows": (lambda f: f.assign(v=[np.nan] + list(f.v[1:])), ["--coords", "x,y",
                                                                   "--value", "v"], "row(s) 1"),
    "duplicates": (lambda f: pd.concat([f, f.iloc[:2]]), ["--coords", "x,y", "--value", "v"],
                   "--average-duplicates"),
    "constant": (lambda f: f.assign(v=2.5), ["--coords", "x,y", "--value", "v"],
                 "same value"),
    "latitude": (lambda f: f.assign(y=f.y * 100 + 20), ["--coords", "x,y", "--value", "v",
                                                         "--coord-system", "lonlat"],
                 "latitude outside"),
    "too_few": (lambda f: f.iloc[:10], ["--coords", "x,y", "--value", "v"], "at least 30"),
}


@pytest.mark.parametrize("case", sorted(BAD_CASES))
def test_bad_input_exit_2_and_nothing_written(case, tmp_path, capsys):
    change, argv, message = BAD_CASES[case]
    path = tmp_path / "data.csv"
    change(_frame()).to_csv(path, index=False)
    out = tmp_path / "out"
    assert _run([str(path), *argv, "--out", str(out)]) == 2
    assert message in capsys.readouterr().err
    assert not out.exists()
    assert [p.name for p in tmp_path.iterdir()] == ["data.csv"]


@pytest.mark.parametrize("name,content,message", [
    ("data.json", '{"x": 1}', "unrecognised file type"),
    ("empty.csv", "", "empty"),
])
def test_not_a_table_exit_2(name, content, message, tmp_path, capsys):
    path = tmp_path / name
    path.write_text(content)
    assert _run([str(path), "--coords", "x,y", "--value", "v",
                 "--out", str(tmp_path / "out")]) == 2
    assert message in capsys.readouterr().err
    assert not (tmp_path / "out").exists()


def test_end_to_end_json(tmp_path, capsys):
    # A field with known model: the check runs the dense path and reports every key.
    rng = np.random.default_rng(3)
    x = rng.uniform(0, 10, (250, 2))
    k = make_kernel("matern32", {"variance": 1.0, "lengthscale": 2.0, "nugget": 0.1})
    v = 5 + DenseCholesky(x, k).apply_sqrt(rng.standard_normal(250))
    path = tmp_path / "field.parquet"
    pd.DataFrame({"e": x[:, 0], "n": x[:, 1], "z": v}).to_parquet(path)
    out = tmp_path / "out"
    code = _run([str(path), "--coords", "e,n", "--value", "z", "--tolerances",
                 "1e-3,1e-6,1e-9", "--out", str(out), "--json", "--no-refit"])
    result = json.loads(capsys.readouterr().out)
    assert code == 0
    for key in ("n", "kernel", "params", "se", "loglik", "reference",
                "recommended_tolerance", "tolerances"):
        assert key in result
    assert result["n"] == 250 and result["reference"] == "dense"
    rows = {row["tol"]: row for row in result["tolerances"]}
    assert rows[1e-9]["safe"]
    assert rows[1e-9]["loglik_error"]["threshold"] == 0.1
    assert abs(rows[1e-9]["loglik_error"]["value"]) < 1e-4
    assert result["recommended_tolerance"] in rows
    assert (out / "check.json").exists() and (out / "check.html").exists()


def test_efficiency_closed_form():
    # Source: definitions of Hong et al. (2021): with Sigma~ = c Sigma (same weights,
    # presumed MSE scaled by c), LOE = 0 and MOM = c - 1 at every point.
    rng = np.random.default_rng(1)
    x = rng.uniform(0, 1, (80, 2))
    x0 = rng.uniform(0, 1, (10, 2))
    k = make_kernel("matern52", {"variance": 1.0, "lengthscale": 0.3, "nugget": 0.01})
    sigma = k.covariance(x)
    cross = k.cross_covariance(x, x0)
    lam = np.linalg.solve(sigma, cross)
    var = k.variance - np.einsum("ij,ij->j", cross, lam)
    eff = prediction_efficiency(lam, cross, sigma @ lam, k.variance, var, 1.5 * var)
    assert abs(eff.mloe) < 1e-10
    assert math.isclose(eff.mmom, 0.5, rel_tol=1e-10)


def test_chordal_geometry():
    # Source: closed forms on the sphere: a quarter great circle has chord R sqrt(2);
    # antipodes 2 R; the pole sits at (0, 0, R).
    assert math.isclose(chordal_distance(0, 0, 90, 0), EARTH_RADIUS_KM * math.sqrt(2))
    assert math.isclose(chordal_distance(10, 20, -170, -20), 2 * EARTH_RADIUS_KM)
    pole = lonlat_to_chordal(np.array([33.0]), np.array([90.0]))[0]
    assert np.allclose(pole, [0, 0, EARTH_RADIUS_KM], atol=1e-9)
