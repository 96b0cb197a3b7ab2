"""Speed of the tiled dense Cholesky and inverse against one multi-threaded LAPACK call.

The dense reference factors Sigma by tiles (``harness.linalg.tiled_cholesky``) so that no
BLAS call sees an operand above 2^20 entries, the shape that crashes the threaded
OpenBLAS of SciPy's wheel (``harness.linalg.tile_bounds``). This script measures what
that costs: at each n (2D uniform points, Matern 3/2, l = 0.1, nugget 1e-2, default BLAS
threads) the median wall time of ``tiled_cholesky`` against one ``dpotrf`` call, and of
``tiled_inverse_from_cholesky`` against one ``dpotri`` call (``--inverse-n``). Each
measurement runs in its own child process, since the LAPACK calls can crash; a crash is
recorded as such, not retried. The methods alternate within each repeat (dpotrf, tiled,
dpotrf, tiled, ...) so that a drift of the machine's speed hits both alike. Assembly is
not timed. The results file records the same-run unit (one dpotrf at n = 8,192) and the
machine.

Run::

    python benchmarks/dense_tiled.py --n 16000 20000 --inverse-n 16000 --repeats 3 \
        --json benchmarks/results/dense_tiled.json
"""

from __future__ import annotations

import argparse
import sys

from machine_unit import machine, measure_unit, median, run_child, write_run

_CHILD = r"""
import json, sys, time
import numpy as np
from harness.model.kernels import Matern32, assemble_lower
n, method = int(sys.argv[1]), sys.argv[2]
kernel = Matern32(variance=1.0, lengthscale=0.1, nugget=1e-2)
a = assemble_lower(kernel, np.random.default_rng(0).random((n, 2)))
if method in ("dpotri", "tiled_inverse"):
    from harness.linalg import tiled_cholesky
    assert tiled_cholesky(a) == 0
start = time.perf_counter()
if method == "dpotrf":
    from scipy.linalg import lapack
    a, info = lapack.dpotrf(a, lower=1, overwrite_a=1, clean=0)
elif method == "tiled":
    from harness.linalg import tiled_cholesky
    info = tiled_cholesky(a)
elif method == "dpotri":
    from scipy.linalg import lapack
    a, info = lapack.dpotri(a, lower=1, overwrite_c=1)
else:
    from harness.linalg import tiled_inverse_from_cholesky
    info = tiled_inverse_from_cholesky(a)
seconds = time.perf_counter() - start
print(json.dumps({"seconds": seconds, "info": int(info)}))
"""

PAIRS = {"factor": ("dpotrf", "tiled"), "inverse": ("dpotri", "tiled_inverse")}


def measure(n: int, kind: str, repeats: int) -> dict:
    """Alternating runs of LAPACK's one call and the tiled routine at n (medians)."""
    lapack_name, tiled_name = PAIRS[kind]
    runs: dict[str, list] = {lapack_name: [], tiled_name: []}
    for _ in range(repeats):
        for method in (lapack_name, tiled_name):
            out = run_child(_CHILD, str(n), method)
            runs[method].append(out.get("seconds", out.get("error")))
            print(f"  n = {n:,} {method}: {runs[method][-1]}", flush=True)
    row: dict = {"n": n, "kind": kind, "runs": runs}
    for method, values in runs.items():
        times = [v for v in values if isinstance(v, float)]
        row[f"{method}_median_seconds"] = median(times) if len(times) == repeats else None
        row[f"{method}_crashes"] = [v for v in values if not isinstance(v, float)]
    base, tiled = row[f"{lapack_name}_median_seconds"], row[f"{tiled_name}_median_seconds"]
    row["tiled_over_lapack"] = None if base is None or tiled is None else tiled / base
    return row


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__,
                                     formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--n", type=int, nargs="+", default=[16000, 20000])
    parser.add_argument("--inverse-n", type=int, nargs="*", default=[16000])
    parser.add_argument("--repeats", type=int, default=3)
    parser.add_argument("--unit-repeats", type=int, default=3)
    parser.add_argument("--json", default="benchmarks/results/dense_tiled.json")
    args = parser.parse_args(argv)
    info = machine()
    unit = measure_unit(args.unit_repeats)
    print(f"unit: {unit['seconds']:.2f} s", flush=True)
    rows = [measure(n, "factor", args.repeats) for n in args.n]
    rows += [measure(n, "inverse", args.repeats) for n in args.inverse_n]
    for row in rows:
        for key, value in list(row.items()):
            if key.endswith("_median_seconds") and value is not None:
                row[key.replace("_seconds", "_units")] = value / unit["seconds"]
        print(f"n = {row['n']:,} {row['kind']}: tiled / LAPACK = {row['tiled_over_lapack']}")
    write_run(args.json, "dense_tiled", argv, info, unit=unit, rows=rows)
    return 0


if __name__ == "__main__":
    sys.exit(main())
