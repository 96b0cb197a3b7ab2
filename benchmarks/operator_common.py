"""What the operator benchmarks share: the same-run time unit and the machine record.

The unit is one dense Cholesky factorization at n = 8,192 (``scipy.linalg.cho_factor``,
LAPACK dpotrf, default BLAS threads), median of repeats, measured in the same run, so
that figures taken on a shared machine can be compared as ratios.
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import numba
import numpy as np
from machine_unit import run_child
from threadpoolctl import threadpool_info

from harness.infra.machine import cpu_description, library_versions

RESULTS = Path(__file__).resolve().parent / "results"


_UNIT_CHILD = r"""
import json, sys, time
import numpy as np
from scipy.linalg import cho_factor
n, repeats = int(sys.argv[1]), int(sys.argv[2])
rng = np.random.default_rng(0)
a = rng.standard_normal((n, 512))
spd = a @ a.T / 512 + np.eye(n)
times = []
for _ in range(repeats):
    start = time.perf_counter()
    cho_factor(spd, lower=True, overwrite_a=False, check_finite=False)
    times.append(time.perf_counter() - start)
print(json.dumps({"seconds": times}))
"""


def cholesky_unit(repeats: int = 3) -> dict[str, Any]:
    """Median seconds of ``cho_factor`` on an 8,192 x 8,192 SPD matrix.

    Measured in a child process (``machine_unit.run_child``): one threaded dpotrf call
    can crash natively in some BLAS builds, and a crash must not take the benchmark down.
    """
    n = 8192
    out = run_child(_UNIT_CHILD, str(n), str(repeats))
    if "error" in out:
        raise RuntimeError(f"unit measurement (cho_factor at n = {n}) failed: {out['error']}")
    times = out["seconds"]
    return {"n": n, "median_seconds": float(np.median(times)), "seconds": times,
            "repeats": repeats,
            "what": "scipy.linalg.cho_factor (LAPACK dpotrf) at n = 8192, default BLAS threads"}


def machine() -> dict[str, Any]:
    """CPU model, threads (numba and BLAS pools) and library versions."""
    pools = [{"api": p.get("user_api"), "library": p.get("internal_api"),
              "threads": p.get("num_threads"), "version": p.get("version")}
             for p in threadpool_info()]
    return {"cpu": cpu_description(), "numba_threads": numba.get_num_threads(),
            "numba_threading_layer": numba.config.THREADING_LAYER, "thread_pools": pools,
            "versions": library_versions()}


def write_results(name: str, payload: dict[str, Any]) -> Path:
    """Write ``benchmarks/results/NAME.json`` (NaN as null) and return the path."""
    from harness.model.json_values import to_jsonable

    RESULTS.mkdir(parents=True, exist_ok=True)
    path = RESULTS / f"{name}.json"
    path.write_text(json.dumps(to_jsonable(payload), indent=2, allow_nan=False) + "\n")
    return path
