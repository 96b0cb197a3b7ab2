"""``covaudit run --reference operator``: run tasks judged against the exact operator.

Expected values come from the certified dense reference on the same task (the same data
streams), which the operator reference must match within its own standard error and
bound (Ubaru, Chen and Saad 2017 for the stochastic log det; the CG bound of
``harness.references.operator.pcg``).
"""

import numpy as np
import pandas as pd
import pytest

from harness.cli import main

CASE = """
name = "operator-run"
seeds = [0]

[[pointsets]]
file = "field.csv"
columns = ["x", "y"]
values = "value"

[[kernels]]
family = "matern32"
variance = 1.0
lengthscale = 0.2
nugget = 1e-2

[mean]
models = ["zero"]

[[solvers]]
name = "hodlr"
tolerances = [1e-6]
options = { leaf_size = 64 }

[trace]
method = "exact"

[metrics]
compute = ["loglik"]

[timing]
enabled = false
"""


@pytest.fixture(scope="module")
def runs(tmp_path_factory):
    base = tmp_path_factory.mktemp("operator-run")
    # Observed values from a file, so both runs audit the same y (a drawn y would come
    # from a different factor of Sigma under each reference).
    rng = np.random.default_rng(11)
    xy = rng.random((400, 2))
    field = np.sin(6 * xy[:, 0]) * np.cos(4 * xy[:, 1]) + 0.1 * rng.standard_normal(400)
    pd.DataFrame({"x": xy[:, 0], "y": xy[:, 1], "value": field}).to_csv(
        base / "field.csv", index=False)
    case = base / "case.toml"
    case.write_text(CASE)
    out = {}
    for reference in ("dense", "operator"):
        rc = main(["run", str(case), "--out", str(base / reference), "--reference", reference])
        assert rc in (0, 3)  # 3: a task failed (listed)
        out[reference] = pd.read_csv(base / reference / "results.csv")
    return out


def test_operator_tasks_record_the_operator_reference_and_its_uncertainty(runs):
    row = runs["operator"].iloc[0]
    assert row["status"] == "ok"
    assert row["reference"] == "operator"
    assert 0 < row["reference_loglik_se"] < 0.02        # the default SE target (issue 10)
    assert row["reference_loglik_bound"] >= 0
    dense = runs["dense"].iloc[0]
    assert dense["reference"] == "dense" and dense["reference_loglik_se"] == 0


def test_operator_and_dense_references_agree_within_the_stated_uncertainty(runs):
    op, dense = runs["operator"].iloc[0], runs["dense"].iloc[0]
    # The solver's error is the same number seen from two truths: their difference is the
    # operator reference's own error, within 3 SE plus its bound (and float rounding).
    gap = abs(op["loglik_error"] - dense["loglik_error"])
    assert gap <= 3 * op["reference_loglik_se"] + op["reference_loglik_bound"] + 1e-6


def test_run_verdict_uses_the_operator_uncertainty_and_never_calls_unmeasured_safe(runs):
    from harness.audit.verdict import _uncertainty, judge

    op = runs["operator"]
    row = op.iloc[0]
    assert _uncertainty(row, "loglik_abs_err") == {
        "se": row["reference_loglik_se"], "bound": row["reference_loglik_bound"]}
    # Without Fisher information the parameter shift is not measured: not safe.
    verdicts = judge(op)
    statuses = {v.status for v in verdicts.verdicts}
    assert statuses and "safe" not in statuses
    # An operator row that lost its SE is not silently exact.
    lost = row.drop(["reference_loglik_se"])
    assert np.isnan(_uncertainty(lost, "loglik_abs_err")["se"])
