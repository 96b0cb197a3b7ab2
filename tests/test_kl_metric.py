"""The KL divergence of each audited Sigma~ from the exact Sigma, in ``check``'s output.

With the dense reference, every (knob value, seed) audit carries ``kl_nat`` =
KL(N(0, Sigma) || N(0, Sigma~)) (``harness.audit.metrics.kl_divergence``). The test
recomputes it for the Vecchia solver at the same fixed parameters with dense numpy
(source: the closed form 1/2 [tr(Sigma~^-1 Sigma) - n + log det Sigma~ - log det Sigma],
e.g. Schafer, Katzfuss and Owhadi 2021, SIAM J. Sci. Comput. 43(3), eq. 2.1).
"""

from __future__ import annotations

import argparse
import json
from pathlib import Path

import numpy as np
import pandas as pd

from harness.cli import check_command as check_cli
from harness.model.kernels import make_kernel
from harness.references import DenseCholesky
from harness.solvers.vecchia import factorize

PARAMS = {"variance": 1.0, "lengthscale": 2.0, "nugget": 0.1}


def _check(argv: list[str]) -> int:
    parser = argparse.ArgumentParser()
    sub = parser.add_subparsers(dest="verb")
    check_cli.add_parser(sub)
    return check_cli.run(parser.parse_args(argv))


def test_check_reports_the_exact_kl_divergence(tmp_path: Path, capsys) -> None:
    rng = np.random.default_rng(8)
    x = rng.uniform(0, 10, (180, 2))
    kernel = make_kernel("matern32", PARAMS)
    z = DenseCholesky(x, kernel).apply_sqrt(rng.standard_normal(180))
    data = tmp_path / "field.csv"
    pd.DataFrame({"e": x[:, 0], "n": x[:, 1], "z": z}).to_csv(data, index=False)
    code = _check(["check", str(data), "--coords", "e,n", "--value", "z", "--kernel",
                   "matern32", "--fixed-params", *(f"{k}={v}" for k, v in PARAMS.items()),
                   "--solver", "vecchia", "--knob-values", "2,8", "--reference", "dense",
                   "--solver-seeds", "1", "--no-refit", "--json",
                   "--out", str(tmp_path / "out")])
    assert code in (0, 1)
    rows = json.loads(capsys.readouterr().out)["tolerances"]
    assert [r["knob_value"] for r in rows] == [2, 8]
    sigma = kernel.covariance(x)
    n = x.shape[0]
    for row in rows:
        (seed,) = row["seeds"]
        reported = seed["metrics"]["kl_nat"]
        approx = factorize(x, kernel, neighbours=int(row["knob_value"])).matvec(np.eye(n))
        dense = 0.5 * (np.trace(np.linalg.solve(approx, sigma)) - n
                       + np.linalg.slogdet(approx)[1] - np.linalg.slogdet(sigma)[1])
        assert dense > 0
        assert abs(reported - dense) <= 1e-8 * max(1.0, dense)
    assert rows[0]["seeds"][0]["metrics"]["kl_nat"] > rows[1]["seeds"][0]["metrics"]["kl_nat"]
