"""The ``run`` and ``cases`` verbs: output, bad input, and kill-and-resume."""

from __future__ import annotations

import argparse
import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import pandas as pd

from harness.cli import cases_command as cases_verb
from harness.cli import run_command as run_verb
from harness.grid.store import RunStore, is_complete

REPO = Path(__file__).resolve().parents[1]

SLOW_PLUGIN = '''
import time
from harness.solvers.dense_solver import factorize as dense_factorize


def factorize(points, kernel, theta, *, tol=None, delay=0.0):
    time.sleep(delay)
    return dense_factorize(points, kernel, theta, tol=tol)
'''

GRID = """
name = "killable"
seeds = [0, 1, 2, 3, 4, 5]
[[pointsets]]
generator = "uniform"
sizes = [50]
dims = [2]
[[kernels]]
family = "exponential"
lengthscale = 0.3
nugget = 1e-3
[[solvers]]
name = "slow_plugin:factorize"
options = { delay = 0.3 }
[metrics]
compute = ["loglik", "score"]
[timing]
repeats = 1
warmup = 0
"""


def _parse(verb, argv):
    parser = argparse.ArgumentParser()
    sub = parser.add_subparsers(dest="verb")
    verb.add_parser(sub)
    return parser.parse_args(argv)


def test_cases_lists_tasks_without_running(tmp_path, capsys):
    assert cases_verb.run(_parse(cases_verb, ["cases", str(REPO / "cases" / "smoke.toml")])) == 0
    out = capsys.readouterr().out
    assert "smoke: 6 tasks" in out and "hodlr@1e-04" in out and "est. time" in out


def test_malformed_case_file_exits_2_with_line_and_column(tmp_path, capsys):
    bad = tmp_path / "bad.toml"
    bad.write_text("seeds = [0]\nname = \n")
    args = _parse(run_verb, ["run", str(bad), "--out", str(tmp_path / "o")])
    assert run_verb.run(args) == 2
    assert "bad.toml:2:8" in capsys.readouterr().err
    assert not (tmp_path / "o").exists()


def test_unwritable_output_directory_exits_2_before_work(capsys):
    args = _parse(run_verb, ["run", str(REPO / "cases" / "smoke.toml"), "--out",
                             "/sys/covaudit-test-out"])
    assert run_verb.run(args) == 2
    assert "cannot create output directory" in capsys.readouterr().err


def test_smoke_run_writes_the_store(tmp_path, capsys):
    out = tmp_path / "smoke"
    args = _parse(run_verb, ["run", str(REPO / "cases" / "smoke.toml"), "--out", str(out),
                             "--only", "*n300*"])
    assert run_verb.run(args) == 0
    results = pd.read_csv(out / "results.csv")
    assert len(results) == 3 and set(results["status"]) == {"ok"}
    assert results["time_factor_median"].notna().all()
    run_info = json.loads((out / "run.json").read_text())
    assert run_info["status"] == "complete" and run_info["summary"]["ok"] == 3
    assert "3 run (3 ok" in capsys.readouterr().out


def test_sigkill_mid_grid_then_resume(tmp_path):
    plugin = tmp_path / "plugin"
    plugin.mkdir()
    (plugin / "slow_plugin.py").write_text(SLOW_PLUGIN)
    case = tmp_path / "grid.toml"
    case.write_text(GRID)
    out = tmp_path / "out"
    env = dict(os.environ, PYTHONPATH=os.pathsep.join([str(plugin), *sys.path]))
    proc = subprocess.Popen([sys.executable, "-m", "harness.cli.run_command", str(case), "--out",
                             str(out), "--workers", "2"], env=env, start_new_session=True,
                            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    deadline = time.monotonic() + 90
    tasks_dir = out / "tasks"
    while time.monotonic() < deadline:
        if tasks_dir.is_dir() and len(list(tasks_dir.glob("[!.]*.json"))) >= 2:
            break
        time.sleep(0.05)
    os.killpg(proc.pid, signal.SIGKILL)   # the runner and its worker processes
    proc.wait()
    survivors = {p.name: p.read_bytes() for p in tasks_dir.glob("[!.]*.json")}
    assert 2 <= len(survivors) < 6, "the kill should land mid-grid"
    for body in survivors.values():
        json.loads(body)                  # no partial file: every record parses
    finished = {name for name, body in survivors.items() if is_complete(json.loads(body))}
    accuracy = {name: json.loads(body)["result"] for name, body in survivors.items()}

    sys.path.insert(0, str(plugin))
    try:
        args = _parse(run_verb, ["run", str(case), "--out", str(out)])
        assert run_verb.run(args) == 0
    finally:
        sys.path.remove(str(plugin))
    records = RunStore(out).records()
    assert len(records) == 6 and all(is_complete(r) for r in records.values())
    for name in finished:                 # finished tasks were not redone
        assert (tasks_dir / name).read_bytes() == survivors[name]
    for name, result in accuracy.items():  # accuracy work kept, only timing added
        assert json.loads((tasks_dir / name).read_text())["result"] == result
    assert not list(tasks_dir.glob(".tmp-*"))
    assert len(pd.read_csv(out / "results.csv")) == 6
