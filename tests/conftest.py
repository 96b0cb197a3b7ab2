"""Fixtures shared by several test modules, and the BLAS threads of a parallel run."""

from __future__ import annotations

import os

#: In a pytest-xdist worker, one BLAS thread, set before numpy loads and inherited by every
#: process a test starts (``check``, ``run``, their children): the default run has one
#: worker per core, and a threaded BLAS in each would put two threads on every core, whose
#: spinning waits cost time and decide nothing. A test that needs other thread counts sets
#: them itself; ``-n 0`` keeps the machine's defaults.
if os.environ.get("PYTEST_XDIST_WORKER"):
    for _name in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
        os.environ.setdefault(_name, "1")

import signal  # noqa: E402
import warnings  # noqa: E402
from collections.abc import Iterator  # noqa: E402
from pathlib import Path  # noqa: E402

import numpy as np  # noqa: E402
import pandas as pd  # noqa: E402
import pytest  # noqa: E402


@pytest.fixture
def plane_csv(tmp_path: Path) -> tuple[Path, pd.DataFrame]:
    """200 uniform points in the unit square with standard-normal values, as the CSV a
    user would give ``evaluate`` or ``check`` (columns x, y, v), and its frame."""
    rng = np.random.default_rng(4)
    pts = rng.random((200, 2))
    frame = pd.DataFrame({"x": pts[:, 0], "y": pts[:, 1], "v": rng.standard_normal(200)})
    path = tmp_path / "obs.csv"
    frame.to_csv(path, index=False)
    return path, frame


@pytest.fixture(autouse=True)
def _sigint_as_found(request: pytest.FixtureRequest) -> Iterator[None]:
    """Every test leaves SIGINT as it found it: the handler, and whether it is blocked.

    Processes a test starts inherit an ignored or blocked SIGINT across exec, and a
    pytest-xdist worker runs many files in one process, so a change would decide the
    Ctrl-C tests of later files. A change is undone here and named in a warning."""
    can_mask = hasattr(signal, "pthread_sigmask")
    handler = signal.getsignal(signal.SIGINT)
    mask = signal.pthread_sigmask(signal.SIG_BLOCK, []) if can_mask else set()
    yield
    now = signal.getsignal(signal.SIGINT)
    now_mask = signal.pthread_sigmask(signal.SIG_BLOCK, []) if can_mask else set()
    if handler is not None:  # None: a handler not set from Python, nothing to restore
        signal.signal(signal.SIGINT, handler)  # also undoes a change made below Python
    if can_mask and now_mask != mask:
        signal.pthread_sigmask(signal.SIG_SETMASK, mask)
    if now is not handler or now_mask != mask:
        warnings.warn(f"{request.node.nodeid} changed SIGINT handling (handler {now!r}, "
                      f"blocked {sorted(now_mask)}); restored", stacklevel=1)


#: One part of the kernel warm-up (``sys.argv[1]``: "vecchia" or "other"): the Vecchia
#: solver's steps in one process, the rest in the other, since its kernels take about as
#: long to compile as all the others together.
_WARM_UP_PART = """
import sys
from harness.cli.warm_up_command import warm_up_steps
for label, step in warm_up_steps():
    if ("vecchia" in label) == (sys.argv[1] == "vecchia"):
        step()
"""


def pytest_configure(config: pytest.Config) -> None:
    """Before a parallel run's workers start, compile every kernel once, in two processes.

    A fresh checkout (CI) has an empty numba cache (``covaudit warm-up``'s docstring), and
    the tests' many processes would each compile the kernels they call, often the same
    ones at the same time. Here the controller of a ``-n N`` run compiles them all into the
    cache first, the Vecchia solver's in one process and the rest in another; every later
    process loads them. With a warm cache this takes a few seconds. A failure only prints a
    line: each test then compiles what it needs, as without this step."""
    import subprocess
    import sys

    if hasattr(config, "workerinput") or not config.getoption("numprocesses", None):
        return
    parts = [subprocess.Popen([sys.executable, "-c", _WARM_UP_PART, part],
                              stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True)
             for part in ("vecchia", "other")]
    for process in parts:
        _, err = process.communicate()
        if process.returncode != 0:
            print(f"conftest: the kernel warm-up failed ({err.strip()[-300:]}); each test "
                  "compiles what it needs", file=sys.stderr)
