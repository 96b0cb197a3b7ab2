"""The cost estimate of ``covaudit cases``: calibrated by a measured dense rate.

Flop counts: Cholesky n^3/3 (Golub & Van Loan, *Matrix Computations*, 4th ed., section
4.2). The factor-2 agreement with a measured smoke run is a slow check (a full run of
cases/smoke.toml); its committed measurement is benchmarks/results/cost_model.json.
"""

from __future__ import annotations

from pathlib import Path

import pytest

from harness.grid.cases import load_case
from harness.grid.cases.cost import DENSE_FLOPS, estimate_cost, estimate_grid
from harness.linalg.dense_rate import DenseRate, measure_dense_rate

REPO = Path(__file__).resolve().parents[1]


@pytest.fixture(scope="module")
def smoke_tasks():
    return load_case(REPO / "cases" / "smoke.toml").tasks()


def test_probe_measures_a_positive_rate():
    rate = measure_dense_rate(n=256, repeats=1, rng=0)
    assert rate.flops > 1e7 and rate.n == 256 and rate.seconds > 0
    # rate = n^3/3 / seconds (Golub & Van Loan 4.2)
    assert rate.flops == pytest.approx(256 ** 3 / 3 / rate.seconds)
    with pytest.raises(ValueError, match="n must be"):
        measure_dense_rate(n=8)


def test_estimates_scale_inversely_with_the_measured_rate(smoke_tasks):
    slow = estimate_grid(smoke_tasks, dense_limit_bytes=None, rate=DENSE_FLOPS / 2)
    nominal = estimate_grid(smoke_tasks, dense_limit_bytes=None, rate=None)
    assert not nominal.measured and slow.measured
    assert slow.total_seconds == pytest.approx(2 * nominal.total_seconds)
    assert nominal.startup_seconds > 0 and len(nominal.tasks) == len(smoke_tasks)
    with pytest.raises(ValueError, match="rate must be"):
        estimate_cost(smoke_tasks[0], dense_limit_bytes=None, rate=0.0)


def test_bigger_and_tighter_tasks_cost_more(smoke_tasks):
    by = {(t.solver, t.n, t.tol): estimate_cost(t, dense_limit_bytes=None).seconds
          for t in smoke_tasks}
    assert by[("hodlr", 600, 1e-8)] > by[("hodlr", 600, 1e-4)] > 0
    assert by[("hodlr", 600, 1e-8)] > by[("hodlr", 300, 1e-8)]
    assert by[("dense", 600, None)] > by[("dense", 300, None)]


@pytest.mark.slow
def test_smoke_estimate_within_a_factor_2_of_a_measured_run(tmp_path):
    from harness.grid.runner import make_backend, run_grid
    from harness.grid.store import RunStore

    case = load_case(REPO / "cases" / "smoke.toml")
    before = measure_dense_rate(rng=0)
    store = RunStore(tmp_path / "run")
    store.prepare()
    backend = make_backend(workers=None, dask_local=None, scheduler=None)
    try:
        summary = run_grid(case.tasks(), store, backend)
    finally:
        backend.close()
    after = measure_dense_rate(rng=0)
    # the machine's load may change during the run: the probe before or after must agree
    ratios = [estimate_grid(case.tasks(), dense_limit_bytes=None, rate=r).total_seconds
              / summary.seconds for r in (before, after)]
    assert any(0.5 <= q <= 2.0 for q in ratios), (ratios, summary.seconds)
    assert isinstance(before, DenseRate)


def test_operator_reference_cost_is_its_predicted_products_at_the_measured_rate():
    # The operator reference costs (column products) x n^2 / rate
    # (harness.references.operator.product_cost); the dense estimate is not used for it.
    import dataclasses

    from harness.grid.cases.cost import estimate_cost
    from harness.references.operator import estimate_operator_seconds

    task = next(t for t in load_case(Path(__file__).resolve().parent.parent / "cases"
                                     / "smoke.toml").tasks() if t.solver == "hodlr")
    big = dataclasses.replace(task, n=60_000, references=("operator",), timing=False,
                              metrics=("loglik",))
    slow = estimate_cost(big, dense_limit_bytes=None, operator_rate=1e9)
    fast = estimate_cost(big, dense_limit_bytes=None, operator_rate=1e10)
    assert slow.operator_reference and not slow.dense_reference
    expected = estimate_operator_seconds(60_000, rate=1e9, n_params=3, mean_columns=1)
    assert slow.seconds - fast.seconds == pytest.approx(expected * 0.9, rel=1e-9)


def test_a_measured_product_cost_prices_each_call_at_its_width():
    # With a ProductCost (covaudit cases measures one) each product call costs
    # n^2 (e + width c) (harness.references.operator.product_cost): with no entry cost it
    # is the column-rate estimate at rate 1 / c (the same column products), and an entry
    # cost adds n^2 e per call on top.
    import dataclasses

    from harness.grid.cases.cost import estimate_cost
    from harness.references.operator import ProductCost, operator_evaluation_seconds

    task = next(t for t in load_case(Path(__file__).resolve().parent.parent / "cases"
                                     / "smoke.toml").tasks() if t.solver == "hodlr")
    big = dataclasses.replace(task, n=60_000, references=("operator",), timing=False,
                              metrics=("loglik",))
    columns_only = ProductCost(entry_seconds=0.0, column_seconds=1e-10,
                               derivative_entry_seconds=0.0, n=8192, widths=(1, 64, 16),
                               family="matern32")
    by_width = estimate_cost(big, dense_limit_bytes=None, operator_rate=columns_only)
    by_rate = estimate_cost(big, dense_limit_bytes=None, operator_rate=1e10)
    assert by_width.operator_reference
    assert by_width.seconds == pytest.approx(by_rate.seconds, rel=1e-9)
    with_entries = dataclasses.replace(columns_only, entry_seconds=1e-9,
                                       derivative_entry_seconds=2e-9)
    dearer = estimate_cost(big, dense_limit_bytes=None, operator_rate=with_entries)
    added = (operator_evaluation_seconds(60_000, with_entries, n_params=3, mean_columns=1)
             - operator_evaluation_seconds(60_000, columns_only, n_params=3, mean_columns=1))
    assert added > 0
    assert dearer.seconds - by_width.seconds == pytest.approx(added, rel=1e-9)
