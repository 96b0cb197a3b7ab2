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


def test_a_blank_coordinate_unit_is_refused_before_any_work(tmp_path, capsys):
    from harness.cli import main
    from harness.infra.exit_codes import ExitCode

    data = tmp_path / "d.csv"
    data.write_text("x,y,z\n" + "".join(f"{i},{i % 7},{i % 3}\n" for i in range(60)))
    code = main(["check", str(data), "--coords", "x,y", "--value", "z",
                 "--coord-units", " ", "--out", str(tmp_path / "o")])
    assert code == ExitCode.ERROR
    assert "--coord-units: expected a unit such as m or km" in capsys.readouterr().err
    assert not (tmp_path / "o").exists()


def test_unresolved_reasons_and_advice_reach_the_terminal():
    # Issue 23: "unresolved" gives its reason and a remedy that can be run on the terminal,
    # not only in check.json; the probe count advised exceeds the count used (a value
    # reference's Hutch++ score takes at least 64, harness.audit.audit_references).
    from harness.cli.check_summary import summary

    result = replace(example_result(recommended=False), reference="statespace", n=100_000,
                     score_probes=64)
    unresolved = [r for r in result.tolerances if r.status == "unresolved"]
    assert unresolved and all(r.reasons for r in unresolved)
    text = summary(result)
    lines = text.splitlines()
    for row in unresolved:
        assert any(line.startswith("  unresolved at tol ") and row.reasons[0] in line
                   for line in lines)
    assert "what to do:" in text and "--probes 256 (4 x the 64 used)" in text
    assert "Kalman filter ran at 100,000 points" in text
    assert "beyond the memory budget" not in text
