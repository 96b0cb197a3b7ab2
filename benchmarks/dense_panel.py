"""Panel Cholesky of the dense reference against one LAPACK dpotrf call, same matrix.

Matern 3/2, l = 0.1, nugget 1e-2, 2D uniform points; ``blocked_cholesky`` with its
default 512-column panels (in-place dtrsm and dsyrk trailing updates) and one
``dpotrf`` call on copies of the same assembled matrix, alternating, median of
``--repeats``, at an n above 8,192 but below where one threaded call crashed here. Seconds and
units of the same-run unit (``machine_unit``).

Usage::

    python benchmarks/dense_panel.py --n 12288 --json benchmarks/results/dense_panel.json
"""

from __future__ import annotations

import argparse

from machine_unit import machine, measure_unit, median, run_child, write_run

_CHILD = r"""
import json, sys, time
import numpy as np
from scipy.linalg import lapack
from harness.model.kernels import Matern32, assemble_lower
from harness.references.cholesky import blocked_cholesky
n, repeats = int(sys.argv[1]), int(sys.argv[2])
kernel = Matern32(variance=1.0, lengthscale=0.1, nugget=1e-2)
a0 = assemble_lower(kernel, np.random.default_rng(0).random((n, 2)))
one, panel, diff = [], [], 0.0
for _ in range(repeats):
    a = np.asfortranarray(a0.copy())
    t = time.perf_counter()
    lapack.dpotrf(a, lower=1, overwrite_a=1, clean=1)
    one.append(time.perf_counter() - t)
    b = np.asfortranarray(a0.copy())
    t = time.perf_counter()
    blocked_cholesky(b)
    panel.append(time.perf_counter() - t)
    diff = float(np.abs(np.tril(a) - b).max())
    del a, b
print(json.dumps({"dpotrf_seconds": one, "panel_seconds": panel, "max_abs_difference": diff}))
"""


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--n", type=int, nargs="+", default=[12288])
    parser.add_argument("--repeats", type=int, default=3)
    parser.add_argument("--json", default="benchmarks/results/dense_panel.json")
    args = parser.parse_args(argv)
    info = machine()
    unit = measure_unit()
    rows = []
    for n in args.n:
        r = run_child(_CHILD, str(n), str(args.repeats))
        row = {"n": n, **r}
        if "error" not in r:
            one, panel = median(r["dpotrf_seconds"]), median(r["panel_seconds"])
            row.update(dpotrf_median_seconds=one, panel_median_seconds=panel,
                       panel_over_dpotrf=panel / one, dpotrf_units=one / unit["seconds"],
                       panel_units=panel / unit["seconds"])
            print(f"n {n}: panel {panel:.2f} s, one dpotrf {one:.2f} s, ratio {panel / one:.3f}",
                  flush=True)
        rows.append(row)
    write_run(args.json, "dense_panel", argv, info, unit=unit, rows=rows)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
