"""Backends give the same results; faults in solver plugins are recorded, the grid goes on."""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np
import pytest

from harness.grid.cases import load_case
from harness.grid.runner import ProcessBackend, SerialBackend, run_grid
from harness.grid.store import RunStore

PLUGIN = '''
"""A solver plugin that misbehaves on request (test fixture)."""
import os
import time

import numpy as np

from harness.solvers.dense_solver import factorize as dense_factorize


class _NaNLogdet:
    def __init__(self, inner):
        self.inner = inner
        self.n = inner.n
        self.nbytes = inner.nbytes

    def logdet(self):
        return float("nan")

    def solve(self, b):
        return self.inner.solve(b)

    def matvec(self, b):
        return self.inner.matvec(b)


def factorize(points, kernel, theta, *, tol=None, mode="ok", delay=0.0):
    time.sleep(delay)
    if mode == "raise":
        raise RuntimeError("plugin failure on purpose")
    if mode == "crash":
        os._exit(17)
    fact = dense_factorize(points, kernel, theta, tol=tol)
    return _NaNLogdet(fact) if mode == "nan" else fact
'''

GRID = """
name = "tiny"
seeds = [0]
[[pointsets]]
generator = "uniform"
sizes = [80]
dims = [2]
[[kernels]]
family = "matern32"
lengthscale = 0.3
nugget = 1e-3
[mean]
models = ["constant"]
[[solvers]]
name = "hodlr"
tolerances = [1e-6]
options = { leaf_size = 32 }
[[solvers]]
name = "dense"
[trace]
probes = 8
[metrics]
holdout = 10
power_iterations = 8
[timing]
repeats = 1
warmup = 0
"""

FAULTS = """
name = "faults"
seeds = [0]
[[pointsets]]
generator = "uniform"
sizes = [60]
dims = [2]
[[kernels]]
family = "exponential"
lengthscale = 0.3
nugget = 1e-3
[[solvers]]
name = "dense"
[[solvers]]
name = "faulty_plugin:factorize"
options = { mode = "raise" }
[[solvers]]
name = "faulty_plugin:factorize"
options = { mode = "nan" }
[[solvers]]
name = "faulty_plugin:factorize"
options = { mode = "crash" }
[metrics]
compute = ["loglik", "score"]
[timing]
enabled = false
"""


@pytest.fixture(scope="module")
def plugin_dir(tmp_path_factory):
    """The plugin module on disk, importable here and in every worker (PYTHONPATH)."""
    root = tmp_path_factory.mktemp("plugin")
    (root / "faulty_plugin.py").write_text(PLUGIN)
    mp = pytest.MonkeyPatch()
    mp.syspath_prepend(str(root))
    import os
    mp.setenv("PYTHONPATH", os.pathsep.join([str(root), *sys.path]))
    yield root
    mp.undo()


@pytest.fixture(scope="module")
def dask_backend(plugin_dir):
    pytest.importorskip("distributed")
    from harness.grid.runner.dask_backend import DaskBackend

    backend = DaskBackend(local_workers=2)
    yield backend
    backend.close()


def _case(tmp_path: Path, text: str):
    path = tmp_path / "case.toml"
    path.write_text(text)
    return load_case(path)


def _metrics(store: RunStore) -> dict[str, dict]:
    return {k: r["result"]["metrics"] for k, r in store.records().items()}


def _assert_same_metrics(a: dict, b: dict) -> None:
    assert a.keys() == b.keys()
    for key in a:
        assert a[key].keys() == b[key].keys()
        for name, value in a[key].items():
            other = b[key][name]
            if value is None or other is None:
                assert value is other, (key, name)
            else:
                np.testing.assert_allclose(other, value, rtol=1e-9, atol=1e-14,
                                           err_msg=f"{key} {name}")


def test_serial_processes_and_dask_agree(tmp_path, dask_backend):
    case = _case(tmp_path, GRID)
    tasks = case.tasks()
    stores = {}
    for name, backend in (("serial", SerialBackend()), ("processes", ProcessBackend(2)),
                          ("dask", dask_backend)):
        store = RunStore(tmp_path / name)
        summary = run_grid(tasks, store, backend)
        assert (summary.ok, summary.failed, summary.timed) == (2, 0, 2), summary
        stores[name] = store
    serial = _metrics(stores["serial"])
    assert all(r["timing_status"] == "ok" for r in stores["dask"].records().values())
    assert all(r["timing_context"]["concurrent_tasks"] == 1
               for r in stores["processes"].records().values())
    _assert_same_metrics(serial, _metrics(stores["processes"]))
    _assert_same_metrics(serial, _metrics(stores["dask"]))
    # The dense solver against the dense reference is exact to rounding.
    dense = next(r for r in stores["serial"].records().values() if r["task"]["solver"] == "dense")
    assert abs(dense["result"]["metrics"]["loglik_error"]) < 1e-8


def _check_faults(store: RunStore) -> None:
    records = {(r["task"]["solver_options"].get("mode", "dense")): r
               for r in store.records().values()}
    assert records["dense"]["status"] == "ok"
    assert records["raise"]["status"] == "failed"
    assert "plugin failure on purpose" in records["raise"]["error"]["message"]
    assert records["raise"]["error"]["traceback"]
    assert records["nan"]["status"] == "failed"
    assert "nan" in records["nan"]["error"]["message"].lower()
    assert records["crash"]["status"] == "failed"
    assert records["crash"]["error"]["type"] in ("WorkerCrashed", "KilledWorker")


def test_faulty_plugins_are_recorded_on_processes(tmp_path, plugin_dir):
    case = _case(tmp_path, FAULTS)
    store = RunStore(tmp_path / "out")
    summary = run_grid(case.tasks(), store, ProcessBackend(2))
    assert (summary.ok, summary.failed) == (1, 3), summary.failures
    _check_faults(store)


def test_faulty_plugins_are_recorded_on_dask(tmp_path, dask_backend):
    case = _case(tmp_path, FAULTS)
    store = RunStore(tmp_path / "out")
    summary = run_grid(case.tasks(), store, dask_backend)
    assert (summary.ok, summary.failed) == (1, 3)
    _check_faults(store)


def test_resume_skips_finished_and_redoes_failures_only_when_asked(tmp_path, plugin_dir):
    text = FAULTS.replace('[[solvers]]\nname = "faulty_plugin:factorize"\n'
                          'options = { mode = "crash" }\n', "")
    tasks = _case(tmp_path, text).tasks()
    store = RunStore(tmp_path / "out")
    first = run_grid(tasks, store, SerialBackend())
    assert (first.ran, first.ok, first.failed) == (3, 1, 2)
    before = {p.name: p.read_bytes() for p in store.tasks_dir.iterdir()}
    second = run_grid(tasks, store, SerialBackend())
    assert (second.ran, second.already_done, second.kept_failed) == (0, 1, 2)
    assert {p.name: p.read_bytes() for p in store.tasks_dir.iterdir()} == before
    third = run_grid(tasks, store, SerialBackend(), redo_failed=True)
    assert (third.ran, third.failed, third.already_done) == (2, 2, 1)


def test_beyond_the_dense_budget_without_another_reference_is_skipped(tmp_path):
    text = GRID.replace("[timing]", '[reference]\norder = ["dense"]\n[budget]\nmemory = "64 KiB"\n'
                                    "[timing]\nenabled = false\n#")
    tasks = _case(tmp_path, text).tasks()
    store = RunStore(tmp_path / "out")
    summary = run_grid(tasks, store, SerialBackend())
    assert (summary.skipped, summary.failed) == (2, 0)
    for record in store.records().values():
        assert record["status"] == "skipped"
        assert "dense" in record["skip_reason"] and "at n = 80 needs" in record["skip_reason"]


def test_over_the_time_budget_is_skipped_by_the_runner(tmp_path):
    # the runner skips a task whose cost estimate (grid/cases/cost.py) exceeds budget.time
    text = GRID.replace("[timing]", '[budget]\ntime = 1e-9\n[timing]\nenabled = false\n#')
    tasks = _case(tmp_path, text).tasks()
    store = RunStore(tmp_path / "out")
    summary = run_grid(tasks, store, SerialBackend())
    assert (summary.skipped, summary.failed) == (2, 0)
    for record in store.records().values():
        assert "exceeds the time budget of 1e-09 s (budget.time)" in record["skip_reason"]


def test_serial_runs_in_one_reused_child_process(tmp_path, plugin_dir):
    # Issue 12: serial means one at a time, not in-process; the worker is reused, so the
    # start-up (imports) is paid once, not per task.
    import os

    text = FAULTS.replace('[[solvers]]\nname = "faulty_plugin:factorize"\n'
                          'options = { mode = "crash" }\n', "")
    tasks = _case(tmp_path, text).tasks()
    store = RunStore(tmp_path / "out")
    backend = SerialBackend()
    try:
        run_grid(tasks, store, backend)
    finally:
        backend.close()
    pids = {r["worker"]["pid"] for r in store.records().values()}
    assert len(pids) == 1 and os.getpid() not in pids
