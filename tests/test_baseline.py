"""The project's own regression gate: the built-in solver on cases/smoke.toml against the
stored baseline in reference/baselines/smoke (accuracy only: CI machines differ in speed).

The gate must not pass by comparing nothing: it fails unless every baseline task pairs
with a task of the new run (pairing is on the version-free ``pair_key``, so a version
bump still pairs). Regenerate the baseline after an intended accuracy change with the
command in reference/baselines/README.md.
"""

from __future__ import annotations

import json
from pathlib import Path

import pandas as pd

from harness.analysis import load_run
from harness.analysis.regression import compare_runs, default_checks
from harness.cli import main

ROOT = Path(__file__).resolve().parents[1]
BASELINE = ROOT / "reference" / "baselines" / "smoke"


def test_smoke_run_matches_the_stored_baseline(tmp_path, capsys):
    out = tmp_path / "smoke"
    case = ROOT / "cases" / "smoke.toml"
    assert main(["run", str(case), "--out", str(out)]) == 0
    # run.json keeps the case file's text, so the run can be judged without the file.
    assert json.loads((out / "run.json").read_text())["case_text"] == case.read_text()
    code = main(["compare", str(BASELINE), str(out), "--accuracy-only", "--no-report"])
    assert code == 0, capsys.readouterr().out
    # Every baseline task paired (issue 12: a gate that pairs nothing must fail).
    stored = pd.read_csv(BASELINE / "results.csv", dtype=str)
    comparison = compare_runs(load_run(BASELINE), load_run(out),
                              checks=default_checks(accuracy_only=True))
    assert comparison.pair_column == "pair_key", "the baseline lacks pair_key: regenerate it"
    assert comparison.paired == comparison.baseline_tasks == len(stored) > 0
    assert not comparison.missing
