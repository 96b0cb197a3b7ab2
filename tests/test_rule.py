"""The verdict rule lives in one module (``harness/audit/rule.py``) below the engine.

DEVELOPERS.md, "The verdict rule": the engine, the metrics and the run verdicts import the
rule; the rule imports nothing of theirs, so the former loop engine <-> verdict <->
tolerance_metrics is gone (imports inside functions and TYPE_CHECKING blocks count).
"""

from __future__ import annotations

import ast
from pathlib import Path

from harness.audit import engine, rule, tolerance_metrics, verdict

AUDIT = Path(__file__).resolve().parents[1] / "harness" / "audit"


def _imported_modules(path: Path) -> set[str]:
    """Every module a file imports, at any depth of the syntax tree."""
    found: set[str] = set()
    for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
        if isinstance(node, ast.Import):
            found.update(a.name for a in node.names)
        elif isinstance(node, ast.ImportFrom) and node.module:
            found.add(node.module)
    return found


def test_rule_imports_no_harness_module() -> None:
    assert {m for m in _imported_modules(AUDIT / "rule.py") if m.startswith("harness")} == set()


def test_no_loop_between_engine_verdict_and_metrics() -> None:
    names = {"engine": "harness.audit.engine", "verdict": "harness.audit.verdict",
             "tolerance_metrics": "harness.audit.tolerance_metrics"}
    imports = {stem: _imported_modules(AUDIT / f"{stem}.py") for stem in names}
    assert names["engine"] not in imports["verdict"]
    assert names["engine"] not in imports["tolerance_metrics"]
    assert names["verdict"] not in imports["engine"]
    assert names["verdict"] not in imports["tolerance_metrics"]
    for stem in names:
        assert "harness.audit.rule" in imports[stem], stem


def test_one_definition_of_each_piece() -> None:
    assert verdict.Thresholds is rule.Thresholds
    assert verdict.ThresholdError is rule.ThresholdError
    assert tolerance_metrics.Thresholds is rule.Thresholds
    assert engine.recommend is rule.recommend
    assert engine.judge_metric is rule.judge_metric
    assert engine.ReferenceInfo is rule.ReferenceInfo


def test_solver_failed_is_the_worst_status() -> None:
    failed = rule.MetricJudgement("loglik_error", 0.0, 0.0, 0.0, 0.1, rule.SOLVER_FAILED,
                                  "solver failed: crashed")
    unsafe = rule.judge_metric("loglik_error", 5.0, 0.1)
    assert unsafe.status == rule.UNSAFE
    assert rule.worst([unsafe, failed]) is failed
    # Any status but safe blocks every looser tolerance.
    rec = rule.recommend({1e-8: rule.SAFE, 1e-6: rule.SOLVER_FAILED, 1e-4: rule.SAFE})
    assert rec.tol == 1e-8
    assert not rec.monotone
