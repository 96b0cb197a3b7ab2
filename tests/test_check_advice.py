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
