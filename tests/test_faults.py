"""The fault-and-bad-input suite: what a user can get wrong, and what a plugin can break.

Part 1 is a table (``CASES``): command line, expected exit code, and a phrase the output
must contain, run in this process through ``harness.cli.main``. Part 2 runs real
``covaudit`` subprocesses for what only a process can show: a plugin that aborts or
hangs, a second run on a locked directory, a stale lock, kill -9 of a ``--workers 2``
run (no process may be left behind) and the tables a killed run leaves readable. Every
subprocess has a bounded timeout. Each defect of issue 12 is named beside its test.
"""

from __future__ import annotations

import json
import os
import signal
import time
from pathlib import Path

import pandas as pd
import psutil
import pytest
from fault_fixtures import (
    PLUGIN,
    case_text,
    covaudit,
    plugin_solvers,
    start_covaudit,
    write_data,
)

from harness.cli import main


@pytest.fixture(scope="module")
def plugin_dir(tmp_path_factory):
    root = tmp_path_factory.mktemp("fault_plugin")
    (root / "fault_plugin.py").write_text(PLUGIN, encoding="utf-8")
    return root


def _records(run_dir: Path) -> dict[str, dict]:
    out = {}
    for path in (run_dir / "tasks").glob("*.json"):
        record = json.loads(path.read_text())
        out[record["task"]["solver"]] = record
    return out


def _wait_for(predicate, *, timeout: float, what: str) -> None:
    end = time.monotonic() + timeout
    while time.monotonic() < end:
        if predicate():
            return
        time.sleep(0.1)
    raise AssertionError(f"timed out after {timeout} s waiting for {what}")


def _descendants(pid: int) -> list[psutil.Process]:
    try:
        return psutil.Process(pid).children(recursive=True)
    except psutil.NoSuchProcess:
        return []


def _assert_all_gone(processes: list[psutil.Process], *, timeout: float = 15.0) -> None:
    _, alive = psutil.wait_procs(processes, timeout=timeout)
    alive = [p for p in alive if p.is_running() and p.status() != psutil.STATUS_ZOMBIE]
    for p in alive:  # clean up before failing, so one failure leaves nothing behind
        p.kill()
    assert not alive, f"processes left behind: {[p.pid for p in alive]}"


# -- part 2: real subprocesses --------------------------------------------------------

def test_serial_grid_survives_abort_and_hang(tmp_path, plugin_dir):
    # Defects 6 and 7: os.abort() killed a serial grid (exit 134, nothing stored) and a
    # plugin that never returns hung it forever.
    case = tmp_path / "faults.toml"
    case.write_text(case_text(solvers='[[solvers]]\nname = "dense"\n'
                              + plugin_solvers("abort", "hang")))
    out = tmp_path / "run"
    done = covaudit(["run", str(case), "--out", str(out), "--task-timeout", "4"],
                    plugin_dir=plugin_dir, cwd=tmp_path, timeout=150)
    assert done.returncode == 1, done.stderr
    records = _records(out)
    assert records["dense"]["status"] == "ok"
    aborted = records["fault_plugin:abort"]["error"]
    assert aborted["type"] == "WorkerCrashed" and aborted["signal"] == signal.SIGABRT
    assert "SIGABRT" in aborted["message"]
    assert any("about to abort" in line for line in aborted["stderr_tail"])
    hung = records["fault_plugin:hang"]["error"]
    assert hung["type"] == "TaskTimeout" and "timeout of 4 s" in hung["message"]
    results = pd.read_csv(out / "results.csv")
    assert len(results) == 3 and (results["status"] == "ok").sum() == 1


def test_processes_grid_times_out_a_hang(tmp_path, plugin_dir):
    # Defect 7 under --workers 2.
    case = tmp_path / "hang.toml"
    case.write_text(case_text(solvers='[[solvers]]\nname = "dense"\n'
                              + plugin_solvers("hang")))
    out = tmp_path / "run"
    done = covaudit(["run", str(case), "--out", str(out), "--workers", "2",
                     "--task-timeout", "4"], plugin_dir=plugin_dir, cwd=tmp_path, timeout=150)
    assert done.returncode == 1, done.stderr
    records = _records(out)
    assert records["dense"]["status"] == "ok"
    assert records["fault_plugin:hang"]["error"]["type"] == "TaskTimeout"


def test_evaluate_reports_a_crashing_plugin(tmp_path, plugin_dir):
    # Defect 6: evaluate with an aborting plugin died with no message.
    data = write_data(tmp_path / "data.csv")
    base = ["evaluate", str(data), "--coords", "x,y", "--value", "z", "--kernel",
            "exponential", "--param", "lengthscale=0.3", "--param", "nugget=1e-3"]
    done = covaudit([*base, "--solver", "fault_plugin:abort"], plugin_dir=plugin_dir,
                    cwd=tmp_path, timeout=120)
    assert done.returncode == 2
    assert "SIGABRT" in done.stderr and "about to abort" in done.stderr
    hung = covaudit([*base, "--solver", "fault_plugin:hang", "--task-timeout", "2"],
                    plugin_dir=plugin_dir, cwd=tmp_path, timeout=120)
    assert hung.returncode == 2 and "ran longer than 2 s" in hung.stderr


def test_second_run_on_a_directory_is_refused_naming_the_process(tmp_path, plugin_dir):
    # Defect 5: two runs on one --out both ran every task; the last writer won.
    case = tmp_path / "slow.toml"
    case.write_text(case_text(solvers=plugin_solvers("slow seconds=20")))
    out = tmp_path / "run"
    first = start_covaudit(["run", str(case), "--out", str(out)], plugin_dir=plugin_dir,
                           cwd=tmp_path)
    try:
        lock = out / ".covaudit.lock"
        _wait_for(lambda: lock.is_file() and lock.read_text().strip(), timeout=60,
                  what="the first run's lock")
        second = covaudit(["run", str(case), "--out", str(out)], plugin_dir=plugin_dir,
                          cwd=tmp_path, timeout=60)
        assert second.returncode == 2
        assert f"in use by process {first.pid}" in second.stderr
    finally:
        workers = _descendants(first.pid)
        first.kill()
        first.wait(timeout=30)
        _assert_all_gone(workers)


def test_stale_lock_of_a_killed_run_is_taken_over(tmp_path, plugin_dir):
    # Defect 5 (the other half): a lock left by kill -9 must not block the next run.
    case = tmp_path / "slow.toml"
    case.write_text(case_text(solvers=plugin_solvers("slow seconds=30")))
    out = tmp_path / "run"
    first = start_covaudit(["run", str(case), "--out", str(out)], plugin_dir=plugin_dir,
                           cwd=tmp_path)
    lock = out / ".covaudit.lock"
    _wait_for(lambda: lock.is_file() and lock.read_text().strip(), timeout=60,
              what="the first run's lock")
    workers = _descendants(first.pid)
    first.send_signal(signal.SIGKILL)
    first.wait(timeout=30)
    _assert_all_gone(workers)
    assert json.loads(lock.read_text())["pid"] == first.pid  # left behind
    case.write_text(case_text(solvers='[[solvers]]\nname = "dense"\n'))
    again = covaudit(["run", str(case), "--out", str(out)], plugin_dir=plugin_dir,
                     cwd=tmp_path, timeout=120)
    assert again.returncode == 0, again.stderr
    assert f"took over the stale lock of process {first.pid}" in again.stderr


@pytest.mark.parametrize("moment", ["before any worker", "first worker seen",
                                    "workers running tasks"])
def test_kill_9_of_a_two_worker_run_leaves_no_process(tmp_path, plugin_dir, moment):
    # Defect 8: killing a --workers 2 run left its workers running under PID 1. Killed
    # while starting, while the workers start up, and while they run tasks.
    case = tmp_path / "grid.toml"
    case.write_text(case_text(solvers=plugin_solvers("slow seconds=30", "slow seconds=31",
                                                     "slow seconds=32")))
    out = tmp_path / "run"
    run = start_covaudit(["run", str(case), "--out", str(out), "--workers", "2"],
                         plugin_dir=plugin_dir, cwd=tmp_path)
    seen: dict[int, psutil.Process] = {}

    def workers() -> int:
        for p in _descendants(run.pid):
            seen[p.pid] = p
        return sum("covaudit" in " ".join(_cmdline(p)) or "multiprocessing" in
                   " ".join(_cmdline(p)) for p in seen.values())

    if moment == "before any worker":
        time.sleep(0.3)
        workers()
    elif moment == "first worker seen":
        _wait_for(lambda: workers() >= 1, timeout=90, what="a worker process")
    else:
        _wait_for(lambda: workers() >= 2, timeout=90, what="two worker processes")
        time.sleep(1.5)
        workers()
    run.send_signal(signal.SIGKILL)
    run.wait(timeout=30)
    _assert_all_gone(list(seen.values()))


def _cmdline(p: psutil.Process) -> list[str]:
    try:
        return p.cmdline()
    except (psutil.NoSuchProcess, psutil.AccessDenied, psutil.ZombieProcess):
        return []


def test_killed_run_can_be_reported_at_once(tmp_path, plugin_dir):
    # Defect 9: results.csv was written only at the end, so report after a kill said
    # "results.csv: not found".
    case = tmp_path / "grid.toml"
    case.write_text(case_text(solvers='[[solvers]]\nname = "dense"\n'
                              + plugin_solvers("slow seconds=60")))
    out = tmp_path / "run"
    run = start_covaudit(["run", str(case), "--out", str(out)], plugin_dir=plugin_dir,
                         cwd=tmp_path)
    try:
        _wait_for(lambda: (out / "results.csv").is_file()
                  and "ok" in (out / "results.csv").read_text(), timeout=90,
                  what="the dense task's row in results.csv")
    finally:
        workers = _descendants(run.pid)
        run.send_signal(signal.SIGKILL)
        run.wait(timeout=30)
        _assert_all_gone(workers)
    report = covaudit(["report", str(out)], plugin_dir=plugin_dir, cwd=tmp_path, timeout=120)
    assert report.returncode == 0, report.stderr
    assert "not found" not in report.stderr
    assert (pd.read_csv(out / "results.csv")["status"] == "ok").sum() == 1


def test_case_name_cannot_escape_the_reports_folder(tmp_path, monkeypatch, capsys):
    # Defect 4: the default run directory reports/<case name> was used uncleaned.
    monkeypatch.chdir(tmp_path)
    for name, folder in (("../../escaped", "escaped"), (str(tmp_path / "abs"),
                                                       "abs")):
        case = tmp_path / "case.toml"
        case.write_text(case_text(name=name))
        assert main(["run", str(case)]) == 0
        made = [p for p in (tmp_path / "reports").iterdir()]
        assert any(p.name.endswith(folder) for p in made), made
        assert "not a safe folder name" in capsys.readouterr().err
    assert not (tmp_path.parent.parent / "escaped").exists()
    assert not (tmp_path / "abs").exists()
    assert all(p.parent == tmp_path / "reports" for p in (tmp_path / "reports").iterdir())
    assert os.listdir(tmp_path / "reports")
