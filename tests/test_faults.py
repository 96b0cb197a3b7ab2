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


def test_evaluate_reports_a_crashing_plugin(tmp_path, plugin_dir, capsys, monkeypatch):
    # Defect 6: evaluate with an aborting plugin died with no message (the plugin runs
    # in a child process, so this process survives to say what happened).
    monkeypatch.syspath_prepend(str(plugin_dir))
    monkeypatch.setenv("NUMBA_DISABLE_JIT", "1")
    data = write_data(tmp_path / "data.csv")
    base = ["evaluate", str(data), "--coords", "x,y", "--value", "z", "--kernel",
            "exponential", "--param", "lengthscale=0.3", "--param", "nugget=1e-3"]
    assert main([*base, "--solver", "fault_plugin:abort"]) == 2
    err = capsys.readouterr().err
    assert "SIGABRT" in err and "about to abort" in err
    assert main([*base, "--solver", "fault_plugin:hang", "--task-timeout", "2"]) == 2
    assert "ran longer than 2 s" in capsys.readouterr().err


def test_locked_killed_and_resumed_two_worker_run(tmp_path, plugin_dir):
    # Defect 5: a second run on one --out is refused, naming the process.
    # Defect 8: kill -9 of a --workers 2 run while its workers run tasks leaves no process.
    # Defect 9: the killed run's finished task is in results.csv at once (report works).
    # Defect 5 (other half): the next run takes over the killed run's stale lock.
    case = tmp_path / "grid.toml"
    case.write_text(case_text(solvers='[[solvers]]\nname = "dense"\n'
                              + plugin_solvers("slow seconds=60", "slow seconds=61")))
    out = tmp_path / "run"
    run = start_covaudit(["run", str(case), "--out", str(out), "--workers", "2"],
                         plugin_dir=plugin_dir, cwd=tmp_path)
    seen: dict[int, psutil.Process] = {}
    try:
        _wait_for(lambda: (out / "results.csv").is_file()
                  and "ok" in (out / "results.csv").read_text(), timeout=90,
                  what="the dense task's row in results.csv")
        second = covaudit(["run", str(case), "--out", str(out)], plugin_dir=plugin_dir,
                          cwd=tmp_path, timeout=60)
        assert second.returncode == 2
        assert f"in use by process {run.pid}" in second.stderr
        seen = {p.pid: p for p in _descendants(run.pid)}
        assert len(seen) >= 2, "both workers should be running slow tasks"
    finally:
        seen.update({p.pid: p for p in _descendants(run.pid)})
        run.send_signal(signal.SIGKILL)
        run.wait(timeout=30)
        _assert_all_gone(list(seen.values()))
    report = covaudit(["report", str(out)], plugin_dir=plugin_dir, cwd=tmp_path, timeout=120)
    assert report.returncode == 0, report.stderr
    assert (pd.read_csv(out / "results.csv")["status"] == "ok").sum() == 1
    lock = out / ".covaudit.lock"
    assert json.loads(lock.read_text())["pid"] == run.pid  # left behind by kill -9
    case.write_text(case_text(solvers='[[solvers]]\nname = "dense"\n'))
    again = covaudit(["run", str(case), "--out", str(out)], plugin_dir=plugin_dir,
                     cwd=tmp_path, timeout=120)
    assert again.returncode == 0, again.stderr
    assert f"took over the stale lock of process {run.pid}" in again.stderr
    assert "1 already done" in again.stdout


@pytest.mark.parametrize("moment", ["before any worker", "first worker seen"])
def test_kill_9_of_a_two_worker_run_leaves_no_process(tmp_path, plugin_dir, moment):
    # Defect 8: killing a --workers 2 run left its workers running under PID 1. Killed
    # while starting and while the workers start up (while they run tasks: below).
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


def test_case_name_cannot_escape_the_reports_folder(tmp_path, monkeypatch, capsys):
    # Defect 4: the default run directory reports/<case name> was used uncleaned.
    monkeypatch.chdir(tmp_path)
    monkeypatch.setenv("NUMBA_DISABLE_JIT", "1")  # for the spawned worker only
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


# -- part 1: the table ----------------------------------------------------------------

EVAL = ("evaluate {data} --coords x,y --value z --kernel exponential "
        "--param lengthscale=0.3 --param nugget=1e-3")
CHECK = "check {data} --coords x,y --value z --kernel exponential"


def _flag_cases(command: str, flag: str, bad: tuple[str, ...], phrase: str):
    """argparse refusals: exit 2 naming the flag and the accepted range."""
    return [(f"{command} {flag} {value}", 2, f"argument {flag}: ") for value in bad] + \
        [(f"{command} {flag} {bad[0]}", 2, phrase)]


CASES: list[tuple[str, int, str]] = [
    # Defect 10: numeric flags name the flag and the accepted range.
    *_flag_cases(EVAL, "--memory-budget", ("-1", "nan", "0", "inf", "abc", "1e400"),
                 "takes a number in (0, 1e+06]"),
    *_flag_cases(EVAL, "--tol", ("0", "-1e-4", "1", "2", "nan", "x"), "in (0, 1)"),
    *_flag_cases(EVAL, "--leaf-size", ("0", "1", "-4", "2.5", "abc"), "an integer in [2,"),
    *_flag_cases(EVAL, "--probes", ("0", "-3", "1.5", "many"), "an integer >= 1"),
    *_flag_cases(EVAL, "--seed", ("-1", "0.5", "nan"), "an integer >= 0"),
    *_flag_cases(EVAL, "--task-timeout", ("0", "-2", "nan", "inf"), "in (0, 604800]"),
    *_flag_cases(CHECK, "--holdout", ("0", "1", "-0.1", "nan"), "in (0, 1)"),
    *_flag_cases(CHECK, "--probes", ("0", "x"), "an integer >= 1"),
    *_flag_cases(CHECK, "--dense-fit-max-n", ("0", "-10"), "an integer >= 1"),
    *_flag_cases(CHECK, "--fit-time-budget", ("0", "-5", "nan"), "a number > 0"),
    *_flag_cases(CHECK, "--solver-seeds", ("0", "1001"), "an integer in [1, 1000]"),
    *_flag_cases(CHECK, "--ladder-factor", ("1", "0.5"), "a number > 1"),
    *_flag_cases(CHECK, "--memory-budget", ("-1", "nan"), "in (0, 1e+06]"),
    *_flag_cases(CHECK, "--seed", ("-1",), "an integer >= 0"),
    *_flag_cases("run {case}", "--workers", ("0", "-2", "abc", "1.5"), "an integer in [1,"),
    *_flag_cases("run {case}", "--dask-local", ("0",), "an integer in [1,"),
    *_flag_cases("run {case}", "--task-timeout", ("0", "-3", "nan", "inf"),
                 "in (0, 604800]"),
    *_flag_cases("report {run}", "--loglik-nats", ("0", "-1", "nan"), "a number > 0"),
    *_flag_cases("report {run}", "--param-shift-se", ("0",), "a number > 0"),
    *_flag_cases("report {run}", "--kriging-mean-sd", ("-0.1",), "a number > 0"),
    *_flag_cases("report {run}", "--trace-min-fraction", ("1.5", "-0.1"), "in [0, 1]"),
    *_flag_cases("export {run} --to {tmp}/x", "--level", ("0", "1", "1.5"), "in (0, 1)"),
    *_flag_cases("export {run} --to {tmp}/x", "--seed", ("-1",), "an integer >= 0"),
    *_flag_cases("demo --out {tmp}/demo", "--n", ("0", "5", "abc"), "an integer in [10,"),
    # Defect 10: "did you mean" for kernel and solver names.
    (EVAL.replace("exponential", "exponetial"), 2, "did you mean 'exponential'?"),
    (EVAL.replace("exponential", "matern23"), 2, "did you mean"),
    (EVAL + " --solver hodrl", 2, "did you mean 'hodlr'?"),
    (EVAL + " --solver dens", 2, "did you mean 'dense'?"),
    ("run {case:solver=hodrl}", 2, "did you mean 'hodlr'?"),
    ("run {case:kernel=gausian}", 2, "did you mean 'gaussian'?"),
    # Defect 10: coordinates near the limit of double precision are warned about.
    (EVAL.replace("{data}", "{tiny}"), 0, "rounds to 1 in double precision"),
    (EVAL.replace("{data}", "{far}"), 0, "significant digits in distances"),
    (EVAL, 0, "loglik"),
    # Defect 3: large-nu Matern is evaluated (or refused with the bound), not misread.
    (EVAL.replace("exponential", "matern") + " --param nu=300", 0, "loglik"),
    (EVAL.replace("exponential", "matern") + " --param nu=1e6", 0, "loglik"),
    (EVAL.replace("exponential", "matern") + " --param nu=1e9", 2, "<= 1e+08"),
    (EVAL.replace("exponential", "matern") + " --param nu=0", 2, "nu must be"),
    (EVAL.replace("exponential", "matern"), 2, "nu"),
    # Data files and parameters (these already gave clear errors; kept as they are).
    (EVAL.replace("{data}", "{nan}"), 2, "--drop-missing"),
    (EVAL.replace("{data}", "{nan}") + " --drop-missing", 0, "loglik"),
    (EVAL.replace("{data}", "{empty}"), 2, "the file is empty"),
    (EVAL.replace("{data}", "{header}"), 2, "no data rows"),
    (EVAL.replace("{data}", "{tmp}/missing.csv"), 2, "no such file"),
    (EVAL.replace("--coords x,y", "--coords x,q"), 2, "no column 'q'"),
    (EVAL.replace("--value z", "--value q"), 2, "no column 'q'"),
    (EVAL.replace("lengthscale=0.3", "lengthscale=-1"), 2, "lengthscale must be"),
    (EVAL.replace("lengthscale=0.3", "lengthscale"), 2, "expected name=value"),
    (EVAL.replace("lengthscale=0.3", "lengthscale=abc"), 2, "is not a number"),
    (EVAL.replace("lengthscale=0.3", "lengthscale=0.1,0.2,0.3"), 2, "give one value or 2"),
    (EVAL + " --param bogus=1", 2, "does not take parameter(s) bogus"),
    (EVAL.replace("nugget=1e-3", "nugget=-1"), 2, "nugget must be"),
    (EVAL + " --mean quadratic", 2, "invalid choice: 'quadratic'"),
    (EVAL + " --solver nosuchmodule:factorize", 2, "nosuchmodule"),
    # Case files.
    ("run {tmp}/nosuch.toml", 2, "cannot read the case file"),
    ("run {case:sizes=[-5]}", 2, "sizes"),
    ("run {case:sizes=[]}", 2, "sizes"),
    ('run {case:sizes="abc"}', 2, "sizes"),
    ("run {case:tol=2.0}", 2, "tolerances"),
    ("run {case:tol=-1e-4}", 2, "tolerances"),
    ("run {case:nosolvers}", 2, "solvers"),
    ("run {case:timeout=-1}", 2, "timing.timeout"),
    ("run {case:timeout=0}", 2, "timing.timeout"),
    ('run {case:timeout="abc"}', 2, "timing.timeout"),
    ("run {case:timingkey=bogus}", 2, "bogus"),
    ("run {case:broken}", 2, "case file"),
    ("run {case:empty}", 2, "case file"),
    ("run {case} --only nomatch", 2, "matches --only"),
    # Compare: inputs it cannot read exit 2.
    ("compare {tmp}/nosuch {tmp}/nosuch2", 2, "not a directory"),
    ("compare {run} {run} --fail-on logdet_abs_err", 2, "expected METRIC:FACTORx"),
    ("compare {run} {run} --fail-on nosuch:2x", 2, "unknown metric"),
    ("compare {run} {run} --fail-on t_factor:0.5x", 2, "must be >= 1"),
    ("compare {run} {run} --allow-missing --fail-on-missing", 2, "contradict"),
    ("report {tmp}/nosuch", 2, "not a directory"),
    # Defects 1 and 2: compare cannot pass while comparing nothing, nor on NaN.
    ("compare {run} {run} --no-report --accuracy-only", 0, "paired"),
    ("compare {run} {other} --no-report --accuracy-only", 1, "0 of"),
    ("compare {run} {nanrun} --no-report --accuracy-only", 1, "finite in the baseline"),
    ("compare {run} {halfrun} --no-report --accuracy-only", 1, "missing"),
    ("compare {run} {halfrun} --no-report --accuracy-only --allow-missing", 0, "missing"),
]


@pytest.fixture(scope="module")
def inputs(tmp_path_factory, plugin_dir):
    """Data files, case files and small run directories the table refers to."""
    root = tmp_path_factory.mktemp("inputs")
    files = {"tmp": str(root), "plugin": str(plugin_dir)}
    files["data"] = str(write_data(root / "data.csv"))
    files["nan"] = str(write_data(root / "nan.csv", nan_row=True))
    files["tiny"] = str(write_data(root / "tiny.csv", spread=1e-12))
    files["far"] = str(write_data(root / "far.csv", spread=1e-3, offset=1e9))
    (root / "empty.csv").write_text("")
    files["empty"] = str(root / "empty.csv")
    (root / "header.csv").write_text("x,y,z\n")
    files["header"] = str(root / "header.csv")
    case = root / "case.toml"
    case.write_text(case_text(sizes="[30, 40]"))
    files["case"] = str(case)
    run = root / "run"
    with pytest.MonkeyPatch.context() as mp:
        mp.setenv("NUMBA_DISABLE_JIT", "1")  # for the spawned worker only
        assert main(["run", str(case), "--out", str(run)]) == 0
    files["run"] = str(run)
    frame = pd.read_csv(run / "results.csv", dtype=str)
    for name, edit in (
            ("other", lambda f: f.assign(pair_key="x" + f["pair_key"], key="x" + f["key"])),
            ("nanrun", lambda f: f.assign(loglik_abs_err="nan")),
            ("halfrun", lambda f: f.iloc[:1])):
        target = root / name
        target.mkdir()
        for extra in ("run.json", "timings.csv"):
            (target / extra).write_bytes((run / extra).read_bytes())
        edit(frame.copy()).to_csv(target / "results.csv", index=False)
        files[name] = str(target)
    return files


_CASE_VARIANTS = {
    "solver=hodrl": dict(solvers='[[solvers]]\nname = "hodrl"\n'),
    "kernel=gausian": None,
    "sizes=[-5]": dict(sizes="[-5]"),
    "sizes=[]": dict(sizes="[]"),
    'sizes="abc"': dict(sizes='"abc"'),
    "tol=2.0": dict(solvers='[[solvers]]\nname = "hodlr"\ntolerances = [2.0]\n'),
    "tol=-1e-4": dict(solvers='[[solvers]]\nname = "hodlr"\ntolerances = [-1e-4]\n'),
    "nosolvers": dict(solvers=""),
    "timeout=-1": dict(extra="timeout = -1\n"),
    "timeout=0": dict(extra="timeout = 0\n"),
    'timeout="abc"': dict(extra='timeout = "abc"\n'),
    "timingkey=bogus": dict(extra="bogus = 1\n"),
}


def _case_file(root: Path, variant: str) -> str:
    path = root / f"variant-{abs(hash(variant))}.toml"
    if variant == "broken":
        path.write_text("name = 'x'\n[[pointsets]\n")
    elif variant == "empty":
        path.write_text("")
    elif variant == "kernel=gausian":
        path.write_text(case_text().replace('family = "exponential"', 'family = "gausian"'))
    else:
        path.write_text(case_text(**_CASE_VARIANTS[variant]))
    return str(path)


def _argv(template: str, files: dict[str, str]) -> list[str]:
    out = []
    for word in template.split():
        if word.startswith("{case:") and word.endswith("}"):
            out.append(_case_file(Path(files["tmp"]), word[6:-1]))
            continue
        for name, value in files.items():
            word = word.replace("{" + name + "}", value)
        out.append(word)
    return out


@pytest.mark.parametrize(("template", "code", "phrase"), CASES,
                         ids=[f"{i:03d}" for i in range(len(CASES))])
def test_bad_input_table(template, code, phrase, inputs, capsys, monkeypatch):
    monkeypatch.syspath_prepend(inputs["plugin"])
    monkeypatch.setenv("NUMBA_DISABLE_JIT", "1")  # spawned workers only; tasks are tiny
    monkeypatch.chdir(inputs["tmp"])
    try:
        got = main(_argv(template, inputs))
    except SystemExit as exc:  # argparse refusals
        got = exc.code
    captured = capsys.readouterr()
    text = captured.out + captured.err
    assert got == code, text
    assert phrase in text, text


def test_the_table_is_large_enough():
    assert len(CASES) >= 100
