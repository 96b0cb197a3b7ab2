"""One canonical name per metric (``harness/audit/metric_names.py``), old names kept.

``tests/fixtures/run_v0_1_smoke`` is a run directory of ``cases/smoke.toml`` written by
covaudit 0.1.0 before the canonical names existed (old column names only); it must still
load, gain the canonical columns and compare under either name.
"""

from __future__ import annotations

import ast
import shutil
from pathlib import Path

import numpy as np
import pytest

from harness.analysis.load import load_run
from harness.analysis.regression import compare_runs, default_checks, parse_check
from harness.audit import metric_names
from harness.audit.metric_names import (
    ALIASES,
    LOGLIK_ERR_NAT,
    METRICS,
    canonical_name,
    with_both_names,
    with_canonical_columns,
)
from harness.audit.metric_values import MetricValue
from harness.check.check_records import ToleranceResult
from harness.cli import main
from harness.grid.store.columns import ACCURACY_COLUMNS
from harness.grid.store.tables import result_row
from harness.report.labels import metric_label

ROOT = Path(__file__).resolve().parents[1]
OLD_RUN = ROOT / "tests" / "fixtures" / "run_v0_1_smoke"


def test_each_canonical_name_is_one_constant() -> None:
    tree = ast.parse((ROOT / "harness" / "audit" / "metric_names.py").read_text("utf-8"))
    constants = {t.id: node.value.value for node in tree.body if isinstance(node, ast.Assign)
                 for t in node.targets if isinstance(t, ast.Name) and t.id.isupper()
                 and isinstance(node.value, ast.Constant)}
    assert sorted(constants.values()) == sorted(m.canonical for m in METRICS)
    assert len(set(constants.values())) == len(constants)
    for name, value in constants.items():
        assert getattr(metric_names, name) == value


def test_aliases_are_unambiguous_and_cover_the_contract() -> None:
    pairs = [(alias, m.canonical) for m in METRICS for alias in m.aliases]
    assert len({a for a, _ in pairs}) == len(pairs)          # no old name means two metrics
    assert all(m.column in ACCURACY_COLUMNS for m in METRICS)
    assert all(m.column in m.aliases for m in METRICS)
    assert ALIASES["loglik_abs_err"] == ALIASES["loglik_error"] == LOGLIK_ERR_NAT
    assert canonical_name(LOGLIK_ERR_NAT) == LOGLIK_ERR_NAT
    assert canonical_name("t_total") == "t_total"
    assert with_both_names({"loglik_nats": 0.1}) == {"loglik_nats": 0.1,
                                                      LOGLIK_ERR_NAT: 0.1}


def test_old_run_directory_loads_with_canonical_columns() -> None:
    run = load_run(OLD_RUN)
    assert len(run.results) == 6
    assert run.notes == ()
    frame = with_canonical_columns(run.results)
    for m in METRICS:
        old = np.asarray(run.results[m.column], dtype=float)
        new = np.asarray(frame[m.canonical], dtype=float)
        np.testing.assert_array_equal(new, old)


def test_old_run_compares_under_either_name(tmp_path: Path) -> None:
    run = load_run(OLD_RUN)
    by_old = parse_check("loglik_abs_err:2x")
    by_new = parse_check(f"{LOGLIK_ERR_NAT}:2x")
    by_detail = parse_check("loglik_error:2x")
    assert by_new == by_old == by_detail
    checks = default_checks(accuracy_only=True, overrides=[by_new])
    assert len(checks) == len(default_checks(accuracy_only=True))   # replaced, not added
    comparison = compare_runs(load_run(ROOT / "reference" / "baselines" / "smoke"), run,
                              checks=checks)
    assert comparison.paired == comparison.baseline_tasks == 6
    copy = tmp_path / "old"
    shutil.copytree(OLD_RUN, copy)
    assert main(["compare", str(OLD_RUN), str(copy), "--accuracy-only", "--no-report",
                 "--fail-on", f"{LOGLIK_ERR_NAT}:2x"]) == 0


def test_results_row_holds_both_names() -> None:
    record = {"key": "k", "status": "ok", "task": {"case": "c", "kernel_params": {}},
              "result": {"metrics": {"loglik_abs_error": 0.25, "kriging_mean_sd_max": 0.5}}}
    row = result_row(record)
    assert row["loglik_abs_err"] == row[LOGLIK_ERR_NAT] == 0.25
    assert row["kriging_mean_err_sd_max"] == row["kriging_mean_err_sd"] == 0.5


def test_check_json_holds_both_names() -> None:
    row = ToleranceResult(tol=1e-6, safe=True, reference="dense",
                          metrics=(MetricValue("loglik_error", 0.01, 0.1),
                                   MetricValue("kriging_var_ratio", 0.02)),
                          seconds=1.0, speedup=2.0, nbytes=8).to_dict()
    assert row["loglik_error"] == row[LOGLIK_ERR_NAT]
    assert row["kriging_var_ratio"] == row["kriging_var_err_rel"]


@pytest.mark.parametrize("old", ["loglik_error", "param_shift_se", "kriging_mean_sd"])
def test_labels_follow_the_canonical_name(old: str) -> None:
    assert metric_label(canonical_name(old)) == metric_label(old)
