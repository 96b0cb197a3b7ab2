"""Every solver under test runs in a child process in ``check`` and ``evaluate``, the
built-in ones too (``harness.check.plugin_guard``): a crash of a built-in in its child is
"solver failed" and exit code 3 as for a plugin (DEVELOPERS.md, "Exit codes"), a numerical
breakdown stays "unsafe", the verdicts equal those computed in process, and the default
limit of a call is 10 x its cost estimate + 60 s where the cost model has one
(``harness.infra.solver_timeout``).

The checks stay small: 120 points, fixed parameters, one tolerance, one solver seed, no
refit. The crash is real: a SIGSEGV in the solver's child, through the test hook
``COVAUDIT_TEST_CRASH_STAGE`` (``harness.infra.child_process``).
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from harness.audit.solver_calls import SOLVER_STAGE, SolverIsolation
from harness.check.plugin_guard import IN_PROCESS_VARIABLE, call_estimate, solver_isolation
from harness.cli import main
from harness.infra.child_process import CRASH_STAGE_VARIABLE
from harness.infra.solver_timeout import default_solver_timeout, timeout_from_estimate
from harness.solvers.registry import ResolvedSolver, resolve_solver

N = 120


@pytest.fixture(scope="module")
def field(tmp_path_factory: pytest.TempPathFactory) -> Path:
    root = tmp_path_factory.mktemp("builtin")
    rng = np.random.default_rng(11)
    pd.DataFrame({"e": rng.uniform(0, 10, N), "n": rng.uniform(0, 10, N),
                  "z": rng.normal(size=N)}).to_csv(root / "field.csv", index=False)
    return root / "field.csv"


def _check_args(data: Path, out: Path, solver: str = "hodlr") -> list[str]:
    return ["check", str(data), "--coords", "e,n", "--value", "z", "--kernel", "matern32",
            "--params", "variance=1", "lengthscale=2", "nugget=0.1", "--tolerances", "1e-6",
            "--solver-seeds", "1", "--no-refit", "--solver", solver, "--out", str(out),
            "--json"]


def test_builtins_get_a_guard_with_the_cost_estimate_rule(monkeypatch) -> None:
    monkeypatch.delenv(IN_PROCESS_VARIABLE, raising=False)
    hodlr = resolve_solver("hodlr")
    guard = solver_isolation(hodlr, 2_000, None, values=(1e-4, 1e-8), probes=16)
    assert guard is not None
    estimate = call_estimate(hodlr, 2_000, (1e-4, 1e-8), probes=16)
    assert estimate is not None and estimate > 0
    assert guard.timeout == pytest.approx(10 * estimate + 60)  # the rule at tol 1e-8
    assert call_estimate(hodlr, 2_000, (1e-8,), probes=16) == estimate
    assert solver_isolation(resolve_solver("dense"), 500, None) is not None
    # no estimate (Vecchia's knob has no rank in the model): the rule of n
    vecchia = solver_isolation(resolve_solver("vecchia"), 2_000, None, values=(30.0,))
    assert vecchia is not None and vecchia.timeout == default_solver_timeout(2_000)
    assert solver_isolation(hodlr, 2_000, 5.0).timeout == 5.0  # type: ignore[union-attr]
    monkeypatch.setenv(IN_PROCESS_VARIABLE, "1")  # the benchmark's switch only
    assert solver_isolation(hodlr, 2_000, None) is None


def test_timeout_from_estimate_rule() -> None:
    assert timeout_from_estimate(0.0) == 60.0
    assert timeout_from_estimate(12.5) == 185.0
    for bad in (-1.0, float("nan"), float("inf")):
        with pytest.raises(ValueError):
            timeout_from_estimate(bad)


def _breaks_down(points, kernel, theta, *, tol=None):
    from harness.solvers.hodlr import CompressionBreakdownError

    raise CompressionBreakdownError(level=1, block=0, rows=(0, 8), depth=2,
                                    detail="on purpose")


def _raises(points, kernel, theta, *, tol=None):
    raise ValueError("raised on purpose")


@pytest.mark.parametrize(("factory", "status", "words"),
                         [(_raises, "solver failed", "solver 'hodlr' failed at"),
                          (_breaks_down, "unsafe", "solver 'hodlr' broke down at")])
def test_an_isolated_builtin_error_is_classified(factory, status, words) -> None:
    # In its child a built-in's HODLR breakdown is a finding (unsafe), anything else a
    # failed solver (harness.audit.solver_calls.is_breakdown); the reason says which, so
    # an unsafe row never reads "failed".
    from small_audit import audit_one_value

    solver = ResolvedSolver(name="hodlr", version=None, factory=factory, origin="builtin")
    audit = audit_one_value(solver, isolation=SolverIsolation(timeout=120.0))
    assert audit.verdict.status == status
    assert "on purpose" in audit.verdict.failures[0]
    assert audit.verdict.failures[0].startswith(words)


def test_a_crash_of_hodlr_in_its_child_is_a_failed_solver(field: Path, tmp_path: Path) -> None:
    env = dict(os.environ, **{CRASH_STAGE_VARIABLE: SOLVER_STAGE})
    env.pop(IN_PROCESS_VARIABLE, None)
    proc = subprocess.run([sys.executable, "-m", "harness",
                           *_check_args(field, tmp_path / "out")], cwd=tmp_path, env=env,
                          capture_output=True, text=True, timeout=600, check=False)
    assert proc.returncode == 3, proc.stderr  # DEVELOPERS.md, "Exit codes"
    result = json.loads(proc.stdout)
    (row,) = result["tolerances"]
    assert row["status"] == "solver failed"
    assert "solver 'hodlr' crashed with signal 11 (SIGSEGV) at tol 1e-06, seed 0" in row["error"]
    assert "Traceback" not in proc.stderr


def test_isolated_verdicts_equal_in_process_ones(field: Path, tmp_path: Path, capsys,
                                                 monkeypatch) -> None:
    monkeypatch.delenv(IN_PROCESS_VARIABLE, raising=False)
    assert main(_check_args(field, tmp_path / "child")) == 0
    isolated = json.loads(capsys.readouterr().out)
    monkeypatch.setenv(IN_PROCESS_VARIABLE, "1")
    assert main(_check_args(field, tmp_path / "here")) == 0
    in_process = json.loads(capsys.readouterr().out)
    assert any("ran only in child processes" in note for note in isolated["notes"])
    assert not any("ran only in child processes" in note for note in in_process["notes"])
    for a, b in zip(isolated["tolerances"], in_process["tolerances"], strict=True):
        assert a["status"] == b["status"] and a["reasons"] == b["reasons"]
        for name in ("loglik_err_nat", "param_shift_se", "kriging_mean_err_sd"):
            assert a[name] == b[name], name
        assert [s["loglik"] for s in a["seeds"]] == [s["loglik"] for s in b["seeds"]]


_PRELOAD_THEN_FORK = """
import json, os
import numpy as np
import numba.np.ufunc.parallel as parallel
from harness.solvers.compiled_preload import LOADED
from harness.model.kernels import make_kernel
from harness.solvers.registry import resolve_solver

started = parallel._is_initialized
kernel = make_kernel("matern32", {"variance": 1.0, "lengthscale": 0.2, "nugget": 1e-2})
points = np.random.default_rng(0).random((400, 2))
pid = os.fork()
if pid == 0:  # a parallel kernel in a child forked after the preload
    fac = resolve_solver("vecchia").factorize(points, kernel, None, tol=None, neighbours=10)
    os._exit(0 if np.isfinite(fac.logdet()) else 1)
_, status = os.waitpid(pid, 0)
print(json.dumps([started, os.waitstatus_to_exitcode(status), len(LOADED.parallel_skipped)]))
"""


def test_the_kernel_preload_leaves_forked_children_able_to_run_parallel_kernels() -> None:
    # harness.infra.kernel_cache: loading a parallel kernel would start numba's threading
    # layer, and a child forked after that dies (SIGTERM) at its first parallel loop.
    proc = subprocess.run([sys.executable, "-c", _PRELOAD_THEN_FORK], capture_output=True,
                          text=True, timeout=600, check=False)
    assert proc.returncode == 0, proc.stderr
    started, child_status, skipped = json.loads(proc.stdout.strip().splitlines()[-1])
    assert started is False and skipped > 0
    assert child_status == 0, proc.stderr


_AUDIT_PRELOAD = """
import json
import numba.np.ufunc.parallel as parallel
from harness.audit.line_kernel_preload import LOADED
print(json.dumps([LOADED.loaded, list(LOADED.failed), parallel._is_initialized]))
"""


def test_the_audit_preload_loads_the_line_products_without_threads() -> None:
    # harness.audit.line_kernel_preload: with the line products compiled once (the cache
    # warm), a fresh process's import loads them, fails on nothing and starts no threads.
    from harness.model.kernels import make_kernel
    from harness.references.line_products import LineProducts

    kernel = make_kernel("matern32", {"lengthscale": 1.0, "nugget": 0.1})
    LineProducts(np.arange(20.0), kernel).matvec(np.ones((20, 2)))
    proc = subprocess.run([sys.executable, "-c", _AUDIT_PRELOAD], capture_output=True,
                          text=True, timeout=600, check=False)
    assert proc.returncode == 0, proc.stderr
    loaded, failed, started = json.loads(proc.stdout.strip().splitlines()[-1])
    assert loaded >= 1 and failed == [] and started is False
