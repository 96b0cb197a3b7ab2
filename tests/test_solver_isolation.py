"""Every call into a solver plugin runs in a child process (``harness.audit.solver_calls``,
``harness.check.plugin_guard``): a crash, an exit without a result, a hang or an exception
of the plugin is the status "solver failed" with a one-line reason and exit code 3
(DEVELOPERS.md, "Exit codes"), never a dead ``check`` or a silent exit 0.

The plugins are real modules written to a temporary folder, run by the real command in a
real child process; the well-behaved part of each is the built-in dense solver. The
checks stay small: 150 points, fixed parameters (no fit), one solver seed, ``--no-refit``.
"""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import textwrap
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from harness.audit.solver_trial import ASYMMETRY_WARNING, asymmetry
from harness.cli import main
from harness.infra.solver_timeout import default_solver_timeout

#: Points of the data file; a plugin misbehaves above ``TRIAL_SAFE`` points only, so that
#: it passes its trial (64 points) and fails in the audit.
N = 150
TRIAL_SAFE = 100

#: Plugin bodies by module name: ``factorize`` with the protocol's signature.
PLUGINS = {
    "exits_plugin": f"""
        def factorize(points, kernel, theta, *, tol):
            if points.shape[0] > {TRIAL_SAFE} and tol < 1e-5:
                os._exit(0)
            return dense(points, kernel, theta, tol=tol)
        """,
    "segfault_plugin": f"""
        def factorize(points, kernel, theta, *, tol):
            if points.shape[0] > {TRIAL_SAFE}:
                os.kill(os.getpid(), signal.SIGSEGV)
            return dense(points, kernel, theta, tol=tol)
        """,
    "sleeping_plugin": f"""
        def factorize(points, kernel, theta, *, tol):
            if points.shape[0] > {TRIAL_SAFE}:
                time.sleep(600)
            return dense(points, kernel, theta, tol=tol)
        """,
    "refit_crash_plugin": f"""
        def factorize(points, kernel, theta, *, tol):
            # the second factorization of all points is the refit's first (the audit
            # makes one per tolerance and seed; the trial's 64 points are not counted)
            if points.shape[0] == {N}:
                counter = Path("refit_crash_calls.txt")
                calls = int(counter.read_text()) + 1 if counter.exists() else 1
                counter.write_text(str(calls))
                if calls >= 2:
                    os.kill(os.getpid(), signal.SIGSEGV)
            return dense(points, kernel, theta, tol=tol)
        """,
    "typeerror_plugin": """
        def factorize(points, kernel, theta, *, tol):
            return dense(points, kernel, theta, tol=tol, no_such_option=1)
        """,
    "skewed_plugin": """
        class Skewed:
            '''The dense factorization with ``scale`` x an antisymmetric matrix added to
            its matvec.'''

            def __init__(self, inner, scale):
                self.inner, self.n, self.nbytes = inner, inner.n, inner.nbytes
                g = np.random.default_rng(0).standard_normal((inner.n, inner.n))
                self.skew = scale * (g - g.T)

            def logdet(self):
                return self.inner.logdet()

            def solve(self, b):
                return self.inner.solve(b)

            def matvec(self, b):
                return self.inner.matvec(b) + self.skew @ b

        def factorize(points, kernel, theta, *, tol):
            return Skewed(dense(points, kernel, theta, tol=tol), 1e-5)

        def factorize_badly(points, kernel, theta, *, tol):
            return Skewed(dense(points, kernel, theta, tol=tol), 10.0)
        """,
}
HEADER = """
    import os
    import signal
    import time
    from pathlib import Path

    import numpy as np

    from harness.solvers.dense_solver import factorize as dense
    """


@pytest.fixture(scope="module")
def workspace(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """A folder with the data file and every plugin module."""
    root = tmp_path_factory.mktemp("plugins")
    for name, body in PLUGINS.items():
        (root / f"{name}.py").write_text(textwrap.dedent(HEADER) + textwrap.dedent(body),
                                         encoding="utf-8")
    rng = np.random.default_rng(3)
    pd.DataFrame({"e": rng.uniform(0, 10, N), "n": rng.uniform(0, 10, N),
                  "z": rng.normal(size=N)}).to_csv(root / "field.csv", index=False)
    e, n = rng.uniform(0, 10, N), rng.uniform(0, 10, N)  # a smooth field to fit
    pd.DataFrame({"e": e, "n": n, "z": np.sin(e / 2) + np.cos(n / 3)
                  + 0.3 * rng.normal(size=N)}).to_csv(root / "smooth.csv", index=False)
    return root


def _covaudit(args: list[str], cwd: Path) -> subprocess.CompletedProcess[str]:
    env = dict(os.environ, PYTHONPATH=os.pathsep.join(
        [str(cwd), *filter(None, [os.environ.get("PYTHONPATH")])]))
    return subprocess.run([sys.executable, "-m", "harness", *args], cwd=cwd, env=env,
                          capture_output=True, text=True, timeout=900, check=False)


def _check(workspace: Path, solver: str, out: str, *extra: str
           ) -> subprocess.CompletedProcess[str]:
    return _covaudit(["check", "field.csv", "--coords", "e,n", "--value", "z", "--kernel",
                      "matern32", "--tolerances", "1e-4,1e-6", "--solver-seeds", "1",
                      "--params", "variance=1", "lengthscale=2", "nugget=0.1",
                      "--no-refit", "--solver", solver, "--out", out, *extra], workspace)


def _failed_lines(stderr: str) -> list[str]:
    return [line for line in stderr.splitlines() if "solver failed" in line]


def _rows(out: Path) -> dict[float, dict[str, object]]:
    data = json.loads((out / "check.json").read_text(encoding="utf-8"))
    return {float(row["knob_value"]): row for row in data["tolerances"]}


def test_exit_without_a_result_is_a_failed_solver_not_exit_0(workspace: Path) -> None:
    proc = _check(workspace, "exits_plugin:factorize", "out_exits")
    assert proc.returncode == 3, proc.stderr  # DEVELOPERS.md, "Exit codes": 3 wins over 0
    lines = _failed_lines(proc.stderr)
    assert len(lines) == 1, proc.stderr
    assert ("solver 'exits_plugin:factorize' exited with status 0 without returning a "
            "result at tol 1e-06, seed 0 (n = 150)") in lines[0]
    rows = _rows(workspace / "out_exits")
    assert rows[1e-6]["status"] == "solver failed"
    assert "exited with status 0" in str(rows[1e-6]["error"])
    assert rows[1e-4]["status"] == "safe"  # the other tolerance went on (dense: exact)


def test_a_segfault_is_one_line_without_a_traceback(workspace: Path) -> None:
    proc = _check(workspace, "segfault_plugin:factorize", "out_segv")
    assert proc.returncode == 3, proc.stderr
    lines = _failed_lines(proc.stderr)
    assert len(lines) == 2, proc.stderr  # both tolerances, one line each
    assert all(f"crashed with signal {int(signal.SIGSEGV)} (SIGSEGV)" in x for x in lines)
    assert "Traceback" not in proc.stderr and "Fatal Python error" not in proc.stderr
    assert {row["status"] for row in _rows(workspace / "out_segv").values()} == {
        "solver failed"}


def test_a_hang_is_stopped_by_solver_timeout(workspace: Path) -> None:
    proc = _check(workspace, "sleeping_plugin:factorize", "out_sleep", "--tolerances",
                  "1e-4", "--solver-timeout", "3")
    assert proc.returncode == 3, proc.stderr
    lines = _failed_lines(proc.stderr)
    assert len(lines) == 1, proc.stderr
    assert "timed out after 3 s at tol 0.0001" in lines[0]
    assert "--solver-timeout allows longer" in lines[0]
    assert _rows(workspace / "out_sleep")[1e-4]["status"] == "solver failed"


def test_an_exception_fails_the_trial_before_the_fit(workspace: Path) -> None:
    # No --params: without the trial, a fit would come first.
    proc = _covaudit(["check", "field.csv", "--coords", "e,n", "--value", "z",
                      "--solver", "typeerror_plugin:factorize", "--no-refit",
                      "--out", "out_typeerror"], workspace)
    assert proc.returncode == 3, proc.stderr
    lines = [line for line in proc.stderr.splitlines() if line.strip()]
    assert len(lines) == 1, proc.stderr
    assert lines[0].startswith("covaudit check: solver failed: solver "
                               "'typeerror_plugin:factorize' failed in its trial on 64 "
                               "points, before the fit: ")
    assert "TypeError" in lines[0] and "no_such_option" in lines[0]
    assert not (workspace / "out_typeerror").exists()


def test_a_nonsymmetric_operator_warns_and_a_badly_one_fails(workspace: Path) -> None:
    proc = _check(workspace, "skewed_plugin:factorize", "out_skewed", "--tolerances",
                  "1e-4")
    assert proc.returncode in (0, 1), proc.stderr  # a verdict, not a failed solver
    warned = [line for line in proc.stdout.splitlines()
              if "matvec() is not symmetric at tol 0.0001 on 64 points" in line]
    assert warned, proc.stdout
    assert f"warning above {ASYMMETRY_WARNING:g}" in warned[0]
    bad = _check(workspace, "skewed_plugin:factorize_badly", "out_skewed_badly",
                 "--tolerances", "1e-4")
    assert bad.returncode == 3, bad.stderr
    assert "matvec() is not symmetric" in bad.stderr and "above 0.1" in bad.stderr


def test_a_crash_in_the_refit_is_a_failed_solver(workspace: Path) -> None:
    proc = _covaudit(["check", "smooth.csv", "--coords", "e,n", "--value", "z",
                      "--tolerances", "1e-4", "--solver-seeds", "1", "--solver",
                      "refit_crash_plugin:factorize", "--out", "out_refit"], workspace)
    assert proc.returncode == 3, proc.stderr  # the audit found 1e-4 safe; 3 wins over 0
    lines = _failed_lines(proc.stderr)
    assert len(lines) == 1, proc.stderr
    assert ("solver 'refit_crash_plugin:factorize' crashed with signal 11 (SIGSEGV) in the "
            f"refit at tol 0.0001 (n = {N})") in lines[0]
    data = json.loads((workspace / "out_refit" / "check.json").read_text(encoding="utf-8"))
    assert data["refit"] is None
    assert data["solver_failures"] == [lines[0].removeprefix("covaudit check: solver failed: ")]
    assert _rows(workspace / "out_refit")[1e-4]["status"] == "safe"


@pytest.mark.parametrize(("verb", "flag"), [("check", "--solver-timeout"),
                                            ("evaluate", "--task-timeout")])
@pytest.mark.parametrize("bad", ["0", "-5", "nan", "1e9"])
def test_timeout_options_are_validated(workspace: Path, verb: str, flag: str, bad: str,
                                       capsys: pytest.CaptureFixture[str]) -> None:
    with pytest.raises(SystemExit) as info:  # argparse refuses before any work
        main([verb, str(workspace / "field.csv"), "--coords", "e,n", "--value", "z",
              "--kernel", "matern32", flag, bad])
    assert info.value.code == 2
    # harness.infra.option_specs.SOLVER_TIMEOUT: (0, 7 days] in seconds
    assert (f"argument {flag}: expected a number of seconds in (0, 604800]"
            in capsys.readouterr().err)


def test_evaluate_isolates_a_preconditioner_plugin(workspace: Path) -> None:
    proc = _covaudit(["evaluate", "field.csv", "--coords", "e,n", "--value", "z",
                      "--kernel", "matern32", "--param", "lengthscale=2", "--param",
                      "nugget=0.1", "--solver", "operator", "--preconditioner",
                      "segfault_plugin:factorize"], workspace)
    assert proc.returncode == 3, proc.stderr
    assert ("the operator reference preconditioned by the plugin "
            "'segfault_plugin:factorize' at n = 150 killed by signal 11") in proc.stderr
    assert "Traceback" not in proc.stderr


def test_evaluate_stops_a_hanging_plugin(workspace: Path) -> None:
    proc = _covaudit(["evaluate", "field.csv", "--coords", "e,n", "--value", "z",
                      "--kernel", "matern32", "--param", "lengthscale=2", "--param",
                      "nugget=0.1", "--solver", "sleeping_plugin:factorize",
                      "--task-timeout", "2"], workspace)
    assert proc.returncode == 3, proc.stderr
    assert "ran longer than 2 s and was stopped (--task-timeout allows longer)" in proc.stderr


def test_evaluate_plugin_exception_is_a_failed_solver(workspace: Path) -> None:
    proc = _covaudit(["evaluate", "field.csv", "--coords", "e,n", "--value", "z",
                      "--kernel", "matern32", "--param", "lengthscale=2", "--solver",
                      "typeerror_plugin:factorize"], workspace)
    assert proc.returncode == 3, proc.stderr  # DEVELOPERS.md, "Exit codes": raised
    assert "TypeError" in proc.stderr and "no_such_option" in proc.stderr


def test_default_timeout_rule() -> None:
    # The rule stated in harness/infra/solver_timeout.py: 3600 s * max(1, n / 1e5)^1.5.
    assert default_solver_timeout(1) == 3600.0
    assert default_solver_timeout(100_000) == 3600.0
    assert default_solver_timeout(400_000) == pytest.approx(3600.0 * 8.0)  # 4^1.5 = 8
    assert default_solver_timeout(np.int64(10**6)) == pytest.approx(3600.0 * 10**1.5)
    for bad in (0, -1, 2.5, True):
        with pytest.raises(ValueError, match="positive number of points"):
            default_solver_timeout(bad)  # type: ignore[arg-type]


def test_asymmetry_measure() -> None:
    # By hand, one pair: A = [[0, 1], [-1, 0]] (antisymmetric), u = e1, v = e2:
    # P = u'Av = 1, Q = v'Au = -1, |P - Q| / (|P| + |Q|) = 2 / 2 = 1.
    a = np.array([[0.0, 1.0], [-1.0, 0.0]])
    u, v = np.array([[1.0], [0.0]]), np.array([[0.0], [1.0]])
    assert asymmetry(u, v, a @ u, a @ v) == 1.0
    # A symmetric matrix: only rounding (float64 epsilon 2.2e-16 times a few).
    rng = np.random.default_rng(0)
    g = rng.standard_normal((64, 64))
    s = g + g.T
    u, v = rng.standard_normal((2, 64, 8))
    value = asymmetry(u, v, s @ u, s @ v)
    assert np.isfinite(value) and value < 1e-13
    # S + e K with K antisymmetric: about e ||K||_F / ||S||_F (the module docstring's
    # estimate of ||A - A'||_F / (2 ||A||_F)); the 64 pairs average to within a factor 2.
    k = g - g.T
    e = 1e-3
    expected = e * np.linalg.norm(k) / np.linalg.norm(s)
    value = asymmetry(u, v, (s + e * k) @ u, (s + e * k) @ v)
    assert expected / 2 < value < 2 * expected
    assert asymmetry(u, v, np.zeros((64, 8)), np.zeros((64, 8))) == 0.0
