"""Files the fault-and-bad-input suite (tests/test_faults.py) runs against.

A misbehaving solver plugin, small case files and data files, and a helper that runs
``covaudit`` in a real subprocess with numba's compiler switched off
(``NUMBA_DISABLE_JIT=1``: the tiny problems here run in milliseconds interpreted, and a
fresh worker then starts in about a second instead of compiling for several).
"""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import numpy as np

PLUGIN = '''
"""Solver plugin that misbehaves on request (test fixture of tests/test_faults.py)."""
import os
import sys
import time

from harness.solvers.dense_solver import factorize as dense


def abort(points, kernel, theta, *, tol=None, **options):
    sys.stderr.write("fault_plugin: about to abort\\n")
    sys.stderr.flush()
    os.abort()


def hang(points, kernel, theta, *, tol=None, **options):
    time.sleep(3600)


def slow(points, kernel, theta, *, tol=None, seconds=3.0, **options):
    time.sleep(seconds)
    return dense(points, kernel, theta, tol=tol)


def ok(points, kernel, theta, *, tol=None, **options):
    return dense(points, kernel, theta, tol=tol)
'''


#: The console script's entry point, for ``python -c`` (works without an installed script).
ENTRY = "import sys; from harness.cli import main; sys.exit(main())"


def case_text(*, name: str = "faults", solvers: str = '[[solvers]]\nname = "dense"\n',
              sizes: str = "[30]", extra: str = "") -> str:
    """A tiny case file: exponential kernel, 2-D uniform points, log-likelihood only."""
    return f'''name = "{name}"
seeds = [0]
[[pointsets]]
generator = "uniform"
sizes = {sizes}
dims = [2]
[[kernels]]
family = "exponential"
lengthscale = 0.3
nugget = 1e-3
{solvers}
[metrics]
compute = ["loglik"]
holdout = 8
[timing]
enabled = false
{extra}'''


def plugin_solvers(*entries: str) -> str:
    """``[[solvers]]`` tables for ``fault_plugin:<entry>`` (``entry`` may carry options
    as ``slow seconds=30``)."""
    out = []
    for entry in entries:
        name, *opts = entry.split()
        out.append(f'[[solvers]]\nname = "fault_plugin:{name}"\n')
        if opts:
            pairs = ", ".join(f"{k} = {v}" for k, v in (o.split("=") for o in opts))
            out.append(f"options = {{ {pairs} }}\n")
    return "".join(out)


def write_data(path: Path, *, n: int = 40, spread: float = 1.0, offset: float = 0.0,
               nan_row: bool = False) -> Path:
    """CSV with columns x, y, z: points in [offset, offset + spread]^2, values N(0, 1)."""
    rng = np.random.default_rng(5)
    x = offset + spread * rng.random((n, 2))
    z = rng.standard_normal(n)
    if nan_row:
        z[3] = np.nan
    lines = ["x,y,z"] + [f"{float(a)!r},{float(b)!r},{float(c)!r}"
                         for (a, b), c in zip(x, z, strict=True)]
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return path


def environment(plugin_dir: Path) -> dict[str, str]:
    """The environment of a covaudit subprocess: the plugin importable, no JIT."""
    env = dict(os.environ)
    env["PYTHONPATH"] = os.pathsep.join([str(plugin_dir), *sys.path])
    env["NUMBA_DISABLE_JIT"] = "1"
    env["PYTHONUNBUFFERED"] = "1"
    return env


def covaudit(args: list[str], *, plugin_dir: Path, cwd: Path, timeout: float = 120.0,
             ) -> subprocess.CompletedProcess[str]:
    """Run ``covaudit ARGS`` to completion (bounded by ``timeout``)."""
    return subprocess.run([sys.executable, "-c", ENTRY, *args], cwd=cwd,
                          env=environment(plugin_dir), capture_output=True, text=True,
                          timeout=timeout, check=False)


def start_covaudit(args: list[str], *, plugin_dir: Path, cwd: Path) -> subprocess.Popen[str]:
    """Start ``covaudit ARGS`` in the background."""
    return subprocess.Popen([sys.executable, "-c", ENTRY, *args], cwd=cwd,
                            env=environment(plugin_dir), stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True)
