"""The report's advice when nothing is safe gives only what can be done: the exact
computation only where the dense reference ran; beyond the memory budget, tighter values
or another solver, and more probes for unresolved verdicts (never an impossible step)."""

from __future__ import annotations

from dataclasses import replace

from check_example import example_result

from harness.report.check_report import no_pick_advice, render_check_report


def test_within_the_dense_limit_the_exact_computation_is_advised():
    result = example_result(recommended=False)
    assert result.reference == "dense"
    advice = no_pick_advice(result, "tolerance")
    assert advice.startswith("Use the exact computation at this size")
    assert "--probes 64" in advice  # one verdict is unresolved


def test_beyond_the_dense_limit_the_advice_is_a_runnable_option():
    result = replace(example_result(recommended=False), reference="operator", n=131_072)
    advice = no_pick_advice(result, "tolerance")
    assert "Use the exact computation" not in advice
    assert "beyond the memory budget" in advice and "--tolerances" in advice
    assert "--solver" in advice
    assert advice in render_check_report(result).replace("&#39;", "'")
