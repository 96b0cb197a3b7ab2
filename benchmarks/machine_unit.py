"""Machine description and the same-run time unit for the benchmarks of this folder.

The unit is the wall-clock time of one dense Cholesky factorization (LAPACK dpotrf via
``scipy.linalg.lapack``, default BLAS threads) of a Matern 3/2 covariance at n = 8,192,
measured in a fresh subprocess in the same run as the figures it normalizes (median of
``repeats``). Figures are stated in seconds and in units of it, so that results from a
loaded or a different machine can be compared.
"""

from __future__ import annotations

import json
import os
import platform
import subprocess
import sys
import time
from pathlib import Path

UNIT_N = 8192

_UNIT_CHILD = r"""
import json, sys, time
import numpy as np
from scipy.linalg import lapack
from harness.model.kernels import Matern32, assemble_lower
n, repeats = int(sys.argv[1]), int(sys.argv[2])
kernel = Matern32(variance=1.0, lengthscale=0.1, nugget=1e-2)
a0 = assemble_lower(kernel, np.random.default_rng(0).random((n, 2)))
times, cpu = [], []
for _ in range(repeats):
    a = np.asfortranarray(a0.copy())
    t, c = time.perf_counter(), time.process_time()
    _, info = lapack.dpotrf(a, lower=1, overwrite_a=1, clean=0)
    times.append(time.perf_counter() - t)
    cpu.append(time.process_time() - c)
    if info != 0:
        raise SystemExit(f"dpotrf info={info}")
print(json.dumps({"seconds": times, "cpu_seconds": cpu}))
"""


def run_child(code: str, *args: str) -> dict:
    """Run ``code`` in a fresh interpreter; its last stdout line is JSON."""
    proc = subprocess.run([sys.executable, "-c", code, *args], capture_output=True,
                          text=True, check=False)
    if proc.returncode != 0:
        tail = (proc.stderr.strip().splitlines() or [f"exit status {proc.returncode}"])[-1]
        return {"error": tail}
    return json.loads(proc.stdout.strip().splitlines()[-1])


def median(values: list[float]) -> float:
    s = sorted(values)
    k = len(s)
    return float(s[k // 2] if k % 2 else 0.5 * (s[k // 2 - 1] + s[k // 2]))


def measure_unit(repeats: int = 3) -> dict:
    """The same-run unit: median wall seconds of one dpotrf at n = 8,192."""
    out = run_child(_UNIT_CHILD, str(UNIT_N), str(repeats))
    if "error" in out:
        raise RuntimeError(f"unit measurement (dpotrf at n = {UNIT_N}) failed: {out['error']}")
    return {"name": f"one dpotrf at n = {UNIT_N:,} (Matern 3/2, default BLAS threads)",
            "n": UNIT_N, "seconds": median(out["seconds"]), "repeats": out["seconds"],
            "cpu_seconds": out["cpu_seconds"]}


def _cpu_model() -> str:
    try:
        with open("/proc/cpuinfo") as fh:
            for line in fh:
                if line.startswith("model name"):
                    return line.split(":", 1)[1].strip()
    except OSError:
        pass
    return platform.processor() or "unknown"


def machine() -> dict:
    """CPU model, cores, load average, thread settings and library versions."""
    import numba
    import numpy
    import scipy
    from threadpoolctl import threadpool_info

    return {
        "cpu": _cpu_model(), "cores": os.cpu_count(), "platform": platform.platform(),
        "python": platform.python_version(),
        "load_average": list(os.getloadavg()),
        "threads": {k: os.environ.get(k) for k in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS",
                                                   "MKL_NUM_THREADS", "NUMBA_NUM_THREADS")},
        "blas": [{k: d.get(k) for k in ("internal_api", "version", "num_threads")}
                 for d in threadpool_info()],
        "numba_threads": numba.config.NUMBA_NUM_THREADS,
        "versions": {"numpy": numpy.__version__, "scipy": scipy.__version__,
                     "numba": numba.__version__},
        "date_utc": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()),
    }


def commit() -> str | None:
    """HEAD's hash, with "+uncommitted" when tracked files outside benchmarks/results
    differ from it (the run then measured code that no commit holds). Asked of the
    checkout this script lies in, whatever the working directory."""
    here = Path(__file__).resolve().parent
    proc = subprocess.run(["git", "rev-parse", "HEAD"], capture_output=True, text=True,
                          check=False, cwd=here)
    head = proc.stdout.strip()
    if not head:
        return None
    # pathspecs from the top of the checkout: relative to this folder, "." saw only
    # benchmarks/ and the exclusion missed benchmarks/results
    status = subprocess.run(["git", "status", "--porcelain", "--untracked-files=no", "--",
                             ":(top)", ":(top,exclude)benchmarks/results"],
                            capture_output=True, text=True, check=False, cwd=here)
    return head + "+uncommitted" if status.stdout.strip() else head


def write_results(path: str, payload: dict) -> None:
    os.makedirs(os.path.dirname(path) or ".", exist_ok=True)
    with open(path, "w") as fh:
        json.dump(payload, fh, indent=1)
        fh.write("\n")


def write_run(path: str, benchmark: str, argv: list[str] | None, info: dict,
              **fields: object) -> None:
    """Write the results file of ``benchmarks/<benchmark>.py``: its name, the schema
    version, the command line that ran it, ``commit()``, the machine (``info`` with the
    load average at the end of the run), then ``fields`` in order."""
    machine_now = {**info, "load_average_end": list(os.getloadavg())}
    write_results(path, {"benchmark": benchmark, "schema_version": 1,
                         "command": f"python benchmarks/{benchmark}.py "
                                    + " ".join(argv or sys.argv[1:]),
                         "commit": commit(), "machine": machine_now, **fields})
    print(f"wrote {path}")
