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
import sys
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
    assert done.returncode == 3, done.stderr
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
    assert done.returncode == 3, done.stderr
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
    # exit 3: the solver under test failed (the exit-code table)
    assert main([*base, "--solver", "fault_plugin:abort"]) == 3
    err = capsys.readouterr().err
    assert "SIGABRT" in err and "about to abort" in err
    assert main([*base, "--solver", "fault_plugin:hang", "--task-timeout", "2"]) == 3
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
    *_flag_cases(CHECK, "--holdout", ("0", "1", "-0.1", "nan"), "in (0, 0.5]"),
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
    # The second problem of a list was reported at the first's index.
    ("run {case:tol=-1,2}", 2, "solvers[0].tolerances[1]: expected a tolerance in (0, 1)"),
    ("run {case:grid=0,30}", 2, "pointsets[0].sizes[1]: a tensor grid in 2D needs a perfect"),
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
    with pytest.MonkeyPatch.context() as mp:  # a run of the first task only
        mp.setenv("NUMBA_DISABLE_JIT", "1")
        assert main(["run", str(case), "--out", str(root / "halfrun"),
                     "--only", frame["key"].iloc[0]]) == 0
    files["halfrun"] = str(root / "halfrun")
    for name, edit in (
            ("other", lambda f: f.assign(pair_key="x" + f["pair_key"], key="x" + f["key"])),
            ("nanrun", lambda f: f.assign(loglik_abs_err="nan"))):
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
    "tol=-1,2": dict(solvers='[[solvers]]\nname = "hodlr"\ntolerances = [-1e-4, 2.0]\n'),
}


def _case_file(root: Path, variant: str) -> str:
    path = root / f"variant-{abs(hash(variant))}.toml"
    if variant == "broken":
        path.write_text("name = 'x'\n[[pointsets]\n")
    elif variant == "empty":
        path.write_text("")
    elif variant == "grid=0,30":
        path.write_text(case_text(sizes="[0, 30]").replace('"uniform"', '"tensor_grid"'))
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


# -- issue 23: files verified, unique folders, the environment, failures listed --------

def _cut_mid_line(path: Path) -> bytes:
    """Cut ``path`` in the middle of its last data row; return the bytes left."""
    text = path.read_bytes()
    last = text.rstrip(b"\n").rfind(b"\n") + 1
    cut = text[:last + (len(text) - last) // 2]
    path.write_bytes(cut)
    return cut


def _copy_run(source: str, target: Path) -> Path:
    import shutil

    shutil.copytree(source, target)
    return target


def test_a_results_table_cut_mid_line_is_rebuilt_from_the_task_records(tmp_path, inputs,
                                                                       plugin_dir):
    # A results.csv cut off mid-line was read as data: compare paired a half row and
    # dropped tasks, report and export counted too few.
    cut = _copy_run(inputs["run"], tmp_path / "cut")
    records = sorted(p.name for p in (cut / "tasks").glob("*.json"))
    left = _cut_mid_line(cut / "results.csv")
    for argv, phrase in ((["compare", inputs["run"], str(cut), "--no-report",
                           "--accuracy-only"], "2 of 2 baseline task(s) paired"),
                         (["report", str(cut)], "report.html"),
                         (["export", str(cut), "--to", str(tmp_path / "export")],
                          "scaling.md")):
        done = covaudit(argv, plugin_dir=plugin_dir, cwd=tmp_path)
        assert done.returncode == 0, done.stderr
        assert phrase in done.stdout
        assert f"{cut / 'results.csv'}: its last line is cut off" in done.stderr
        assert "rebuilt from the 2 task records" in done.stderr
        assert "Traceback" not in done.stderr
    assert "0 missing" in covaudit(["compare", inputs["run"], str(cut), "--no-report",
                                    "--accuracy-only"], plugin_dir=plugin_dir,
                                   cwd=tmp_path).stdout
    # nothing lost: the records are all there and the damaged file is left as it was
    assert sorted(p.name for p in (cut / "tasks").glob("*.json")) == records
    assert (cut / "results.csv").read_bytes() == left


@pytest.mark.parametrize("verb", ["compare", "report", "export"])
def test_a_cut_results_table_without_records_is_refused_with_repair_advice(
        verb, tmp_path, inputs, capsys, monkeypatch):
    monkeypatch.chdir(tmp_path)
    cut = _copy_run(inputs["run"], tmp_path / "cut")
    import shutil

    shutil.rmtree(cut / "tasks")
    left = _cut_mid_line(cut / "results.csv")
    argv = {"compare": ["compare", inputs["run"], str(cut), "--no-report"],
            "report": ["report", str(cut)],
            "export": ["export", str(cut), "--to", str(tmp_path / "export")]}[verb]
    assert main(argv) == 2
    err = capsys.readouterr().err
    assert f"{cut / 'results.csv'}: its last line is cut off" in err
    assert "no task records" in err and "to repair it" in err
    assert len(err.strip().splitlines()) == 1
    assert (cut / "results.csv").read_bytes() == left
    assert not (tmp_path / "export").exists() or not any((tmp_path / "export").iterdir())


def test_a_results_table_short_of_run_json_is_not_trusted(tmp_path, inputs, capsys):
    # Complete lines, but fewer rows than run.json says the run wrote (cut at a line end).
    short = _copy_run(inputs["run"], tmp_path / "short")
    lines = (short / "results.csv").read_text().splitlines(keepends=True)
    (short / "results.csv").write_text("".join(lines[:2]))
    from harness.analysis.load import load_run

    data = load_run(short)
    assert len(data.results) == 2
    assert any("where run.json says the run wrote 2" in note for note in data.notes)
    import shutil

    shutil.rmtree(short / "tasks")
    assert main(["report", str(short)]) == 2
    assert "run.json says the run wrote 2" in capsys.readouterr().err


def test_non_ascii_case_names_get_their_own_folders(tmp_path, monkeypatch, capsys):
    # Two case names of non-ASCII letters only both wrote to reports/run.
    monkeypatch.chdir(tmp_path)
    monkeypatch.setenv("NUMBA_DISABLE_JIT", "1")
    folders: dict[str, set[str]] = {}
    for name in ("测试", "实验", "smoke_ascii"):
        case = tmp_path / "case.toml"
        case.write_text(case_text(name=name), encoding="utf-8")
        seen = set(os.listdir(tmp_path / "reports")) if (tmp_path / "reports").is_dir() \
            else set()
        assert main(["run", str(case)]) == 0
        folders[name] = set(os.listdir(tmp_path / "reports")) - seen
    capsys.readouterr()
    assert len(folders["测试"]) == len(folders["实验"]) == 1
    assert folders["测试"] != folders["实验"]
    assert all(f.startswith("run-") for f in folders["测试"] | folders["实验"])
    assert folders["smoke_ascii"] == {"smoke_ascii"}  # ASCII names keep today's folder
    # ... so an existing run resumes there, and a non-ASCII one resumes in its own
    for name in ("smoke_ascii", "测试"):
        (tmp_path / "case.toml").write_text(case_text(name=name), encoding="utf-8")
        assert main(["run", str(tmp_path / "case.toml")]) == 0
        assert "1 already done" in capsys.readouterr().out
    assert len(list((tmp_path / "reports").iterdir())) == 3


def _first_run(tmp_path: Path, monkeypatch) -> tuple[Path, Path, dict[str, bytes]]:
    """A finished one-task run, and its records as bytes (to check nothing is lost)."""
    monkeypatch.setenv("NUMBA_DISABLE_JIT", "1")
    case = tmp_path / "case.toml"
    case.write_text(case_text(sizes="[30, 40]"))
    out = tmp_path / "run"
    assert main(["run", str(case), "--out", str(out), "--only", "uniform-n30-*"]) == 0
    return case, out, {p.name: p.read_bytes() for p in (out / "tasks").iterdir()}


def test_run_without_dask_names_the_extra_and_resumes(tmp_path, monkeypatch, capsys):
    case, out, before = _first_run(tmp_path, monkeypatch)
    assert len(before) == 1
    capsys.readouterr()
    with monkeypatch.context() as mp:
        mp.setitem(sys.modules, "distributed", None)  # as if the extra were not installed
        assert main(["run", str(case), "--out", str(out), "--dask-local", "2"]) == 2
        err = capsys.readouterr().err
        assert len(err.strip().splitlines()) == 1, err
        assert "--dask-local" in err and 'pip install "covaudit[dask]"' in err
        from harness.grid.runner.dask_check import DaskUnavailableError, check_dask_options

        with pytest.raises(DaskUnavailableError, match="--scheduler needs Dask"):
            check_dask_options(dask_local=None, scheduler="tcp://127.0.0.1:8786")
    assert {p.name: p.read_bytes() for p in (out / "tasks").iterdir()} == before
    assert main(["run", str(case), "--out", str(out)]) == 0
    assert "1 already done, 1 run" in capsys.readouterr().out


def test_an_unreachable_scheduler_gives_the_address_and_timeout(tmp_path, monkeypatch,
                                                               capsys):
    pytest.importorskip("distributed")
    import socket

    from harness.grid.runner import dask_check

    case, out, before = _first_run(tmp_path, monkeypatch)
    capsys.readouterr()
    with socket.socket() as probe:  # a port nothing listens on
        probe.bind(("127.0.0.1", 0))
        address = f"tcp://127.0.0.1:{probe.getsockname()[1]}"
    monkeypatch.setattr(dask_check, "SCHEDULER_TIMEOUT_S", 2.0)
    start = time.monotonic()
    assert main(["run", str(case), "--out", str(out), "--scheduler", address]) == 2
    assert time.monotonic() - start < 30
    err = capsys.readouterr().err
    assert len(err.strip().splitlines()) == 1, err
    assert f"--scheduler {address}" in err and "within 2 s" in err
    with pytest.raises(dask_check.DaskUnavailableError, match="within 2 s"):
        dask_check.check_dask_options(dask_local=None, scheduler=address)
    assert {p.name: p.read_bytes() for p in (out / "tasks").iterdir()} == before


def test_a_full_disk_mid_run_names_the_path_and_what_was_kept(tmp_path, monkeypatch,
                                                              capsys):
    # A full disk mid-run ended in a chained traceback naming no path.
    import errno

    from harness.grid.store import run_directory

    case, out, before = _first_run(tmp_path, monkeypatch)
    real = run_directory.atomic_write_json

    def full_disk(path, value):
        if Path(path).parent.name == "tasks" and Path(path).name not in before:
            raise OSError(errno.ENOSPC, "No space left on device")
        return real(path, value)

    capsys.readouterr()
    with monkeypatch.context() as mp:
        mp.setattr(run_directory, "atomic_write_json", full_disk)
        assert main(["run", str(case), "--out", str(out)]) == 2
    err = capsys.readouterr().err
    assert len(err.strip().splitlines()) == 1, err
    assert str(out / "tasks") in err and "the disk is full" in err
    assert "1 task record(s) saved before it are kept" in err
    assert "run the same command again" in err
    assert {p.name: p.read_bytes() for p in (out / "tasks").iterdir()
            if not p.name.startswith(".")} == before
    assert main(["run", str(case), "--out", str(out)]) == 0  # resumes once there is room
    assert "1 already done, 1 run" in capsys.readouterr().out


def test_an_unwritable_output_is_refused_before_any_work(tmp_path, monkeypatch, capsys):
    # Tests run as root, where a read-only mode does not stop writes: a path under a
    # regular file cannot be created by anyone.
    monkeypatch.setenv("NUMBA_DISABLE_JIT", "1")
    case = tmp_path / "case.toml"
    case.write_text(case_text())
    blocker = tmp_path / "a-file"
    blocker.write_text("not a directory\n")
    out = blocker / "run"
    start = time.monotonic()
    assert main(["run", str(case), "--out", str(out)]) == 2
    err = capsys.readouterr().err
    assert len(err.strip().splitlines()) == 1, err
    assert str(out) in err and "--out" in err
    assert time.monotonic() - start < 10  # refused before any task ran
    assert blocker.read_text() == "not a directory\n"


def test_a_rerun_lists_the_failures_it_keeps(tmp_path, plugin_dir):
    # A rerun of a run with failed tasks exited 0 and did not list them; a run whose
    # tasks timed out exited 0 too.
    case = tmp_path / "case.toml"
    case.write_text(case_text(solvers='[[solvers]]\nname = "dense"\n'
                              + plugin_solvers("hang")))
    out = tmp_path / "run"
    argv = ["run", str(case), "--out", str(out), "--task-timeout", "3"]
    first = covaudit(argv, plugin_dir=plugin_dir, cwd=tmp_path, timeout=150)
    assert first.returncode == 3, first.stderr
    assert "failed: " in first.stdout and "TaskTimeout" in first.stdout
    again = covaudit(argv, plugin_dir=plugin_dir, cwd=tmp_path, timeout=150)
    assert again.returncode == 3, again.stderr
    listed = [line for line in again.stdout.splitlines() if "failed: " in line]
    assert len(listed) == 1 and "fault_plugin:hang" in listed[0]
    assert "TaskTimeout" in listed[0] and "--redo-failed" in listed[0]
    assert "1 already done" in again.stdout and "1 earlier failures kept" in again.stdout
    assert len(list((out / "tasks").glob("*.json"))) == 2


def test_a_semicolon_separated_file_is_read_and_said_so(tmp_path, capsys, caplog,
                                                       monkeypatch):
    # "no column x; columns present: x;y;v" gave no hint about the separator.
    monkeypatch.setenv("NUMBA_DISABLE_JIT", "1")
    plain = write_data(tmp_path / "plain.csv")
    semi = tmp_path / "semicolon.csv"
    semi.write_text(plain.read_text().replace(",", ";").replace(".", ","))
    argv = ["evaluate", "--coords", "x,y", "--value", "z", "--kernel", "exponential",
            "--param", "lengthscale=0.3", "--param", "nugget=1e-3", "--json"]
    assert main([argv[0], str(plain), *argv[1:]]) == 0
    expected = json.loads(capsys.readouterr().out)
    with caplog.at_level("WARNING"):
        assert main([argv[0], str(semi), *argv[1:]]) == 0
    got = json.loads(capsys.readouterr().out)
    assert got["loglik"] == pytest.approx(expected["loglik"], rel=1e-12)
    assert f"{semi}: read as a file with fields separated by ';' and a decimal comma" \
        in caplog.text
    from harness.check.datafile import DataFileError, load_observations

    odd = tmp_path / "mixed.csv"  # a header with a comma is read with commas: the hint
    odd.write_text("x;y,z\n0.1;0.2,1.0\n")
    with pytest.raises(DataFileError, match="seems to use ';' between fields"):
        load_observations(odd, coords=["x"], value="z")
