"""The project's own regression gate: the built-in solver on cases/smoke.toml against the
stored baseline in reference/baselines/smoke (accuracy only: CI machines differ in speed)."""

from __future__ import annotations

import json
from pathlib import Path

from harness.cli import main

ROOT = Path(__file__).resolve().parents[1]


def test_smoke_run_matches_the_stored_baseline(tmp_path, capsys):
    out = tmp_path / "smoke"
    case = ROOT / "cases" / "smoke.toml"
    assert main(["run", str(case), "--out", str(out)]) == 0
    # run.json keeps the case file's text, so the run can be judged without the file.
    assert json.loads((out / "run.json").read_text())["case_text"] == case.read_text()
    code = main(["compare", str(ROOT / "reference" / "baselines" / "smoke"), str(out),
                 "--accuracy-only", "--no-report"])
    assert code == 0, capsys.readouterr().out
