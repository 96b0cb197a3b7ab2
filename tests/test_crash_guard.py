"""The child-process guard: a native crash in the harness's own computation (the dense
reference, the dense fit) or in the solver under test is a one-line error with the exit
code of the table in DEVELOPERS.md ("Exit codes"), never a dead process.

The crashes are real: a SIGSEGV raised in the child process of a real stage of the real
``covaudit`` command, through the test hook ``COVAUDIT_TEST_CRASH_STAGE``
(``harness.infra.child_process``).
"""

from __future__ import annotations

import ctypes
import os
import signal
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from harness.infra.child_process import (
    CRASH_STAGE_VARIABLE,
    StageCrashed,
    call_in_child,
    run_stage,
)


def _segfault() -> None:
    ctypes.string_at(0)  # reads address 0: SIGSEGV in native code


def _sleep(seconds: float) -> None:
    import time

    time.sleep(seconds)


def _square(x: float) -> float:
    return x * x


def test_a_native_crash_becomes_one_line_naming_the_stage_and_n():
    with pytest.raises(StageCrashed) as info:
        run_stage(_segfault, stage="the dense reference", n=26_633,
                  advice="OPENBLAS_NUM_THREADS=1")
    message = str(info.value)
    assert "\n" not in message
    assert "the dense reference at n = 26,633" in message
    assert f"signal {int(signal.SIGSEGV)} (SIGSEGV)" in message
    assert "try OPENBLAS_NUM_THREADS=1" in message


def test_a_hang_becomes_one_line_and_results_come_back():
    with pytest.raises(StageCrashed, match="ran longer than 1 s"):
        run_stage(_sleep, 60, stage="the dense fit", n=10, advice="x", timeout=1)
    assert call_in_child(_square, 3.0) == 9.0


def _data_file(tmp_path: Path, n: int = 300) -> Path:
    rng = np.random.default_rng(1)
    path = tmp_path / "field.csv"
    pd.DataFrame({"e": rng.uniform(0, 10, n), "n": rng.uniform(0, 10, n),
                  "z": rng.normal(size=n)}).to_csv(path, index=False)
    return path


def _covaudit(args: list[str], *, crash_stage: str, cwd: Path) -> subprocess.CompletedProcess:
    env = dict(os.environ, **{CRASH_STAGE_VARIABLE: crash_stage})
    return subprocess.run([sys.executable, "-m", "harness", *args], cwd=cwd, env=env,
                          capture_output=True, text=True, timeout=600, check=False)


_ORPHAN_SCRIPT = """
import os, sys, time
from harness.infra.child_process import call_in_child


def nap():
    print(os.getpid(), flush=True)
    time.sleep(300)


if __name__ == "__main__":
    call_in_child(nap)
"""


def test_a_child_dies_with_a_killed_caller_and_so_does_the_fork_server(tmp_path):
    # kill -9 of the caller while its child runs: the child (forked from the fork server)
    # must not keep the server alive, nor the server the child (harness.infra.child_process
    # ``enter_child``); both are gone within seconds, not after the child's 300 s.
    psutil = pytest.importorskip("psutil")
    script = tmp_path / "caller.py"
    script.write_text(_ORPHAN_SCRIPT)
    caller = subprocess.Popen([sys.executable, str(script)], stdout=subprocess.PIPE,
                              text=True)
    family: list = []
    try:
        child_pid = int(caller.stdout.readline())
        family = psutil.Process(caller.pid).children(recursive=True)
        assert child_pid in {p.pid for p in family}
    finally:
        caller.kill()
        caller.wait(timeout=30)
    _, alive = psutil.wait_procs(family, timeout=15)
    alive = [p for p in alive if p.is_running() and p.status() != psutil.STATUS_ZOMBIE]
    for p in alive:
        p.kill()
    assert not alive, f"left behind: {[(p.pid, p.cmdline()[-1:]) for p in alive]}"


def test_check_survives_a_crash_of_the_dense_reference(tmp_path):
    data = _data_file(tmp_path)
    proc = _covaudit(["check", str(data), "--coords", "e,n", "--value", "z", "--kernel",
                      "matern32", "--tolerances", "1e-4", "--solver-seeds", "1",
                      "--params", "variance=1", "lengthscale=2", "nugget=0.1",
                      "--out", str(tmp_path / "out")],
                     crash_stage="the dense reference", cwd=tmp_path)
    assert proc.returncode == 2  # a crash of the harness's own computation
    lines = [line for line in proc.stderr.splitlines() if line.strip()]
    assert lines == [line for line in lines if "Traceback" not in line]
    assert len(lines) == 1, proc.stderr
    assert lines[0].startswith("covaudit check: error: the dense reference at n = 300 ")
    assert "SIGSEGV" in lines[0] and "OPENBLAS_NUM_THREADS=1" in lines[0]


def test_check_survives_a_crash_of_the_dense_fit(tmp_path):
    data = _data_file(tmp_path, n=200)
    proc = _covaudit(["check", str(data), "--coords", "e,n", "--value", "z", "--kernel",
                      "matern32", "--tolerances", "1e-4", "--solver-seeds", "1",
                      "--out", str(tmp_path / "out")],
                     crash_stage="the dense fit", cwd=tmp_path)
    assert proc.returncode == 2
    errors = [line for line in proc.stderr.splitlines() if "covaudit check: error" in line]
    assert len(errors) == 1 and "the dense fit at n = 200 " in errors[0]
    assert "Traceback" not in proc.stderr


def test_evaluate_dense_crash_is_a_failed_solver(tmp_path):
    data = _data_file(tmp_path, n=100)
    proc = _covaudit(["evaluate", str(data), "--coords", "e,n", "--value", "z", "--kernel",
                      "matern32", "--param", "lengthscale=2", "--param", "nugget=0.1",
                      "--solver", "dense"],
                     crash_stage="the dense solver", cwd=tmp_path)
    assert proc.returncode == 3  # the solver under test failed
    assert "the dense solver at n = 100" in proc.stderr and "SIGSEGV" in proc.stderr
    assert "Traceback" not in proc.stderr
