"""Scaling of the HODLR factorization and of the dense reference, in seconds and units.

Problem (the performance targets' setting): 2D uniform points, Matern 3/2, s2 = 1,
l = 0.1, nugget 1e-2, leaf size 128. Each (n, tol) runs in a fresh subprocess (median
of ``--repeats`` factorizations after a warm-up at n = 2,000; peak resident memory
``ru_maxrss`` of that process). The unit, measured in the same run, is one LAPACK
dpotrf at n = 8,192 (``machine_unit``). Also measured: the dense reference
(``DenseCholesky``: assembly, panel factorization and default certificate) against one
dpotrf call at the same n, and the first-call overhead of compiled code in a fresh
process (first minus second factorization at n = 2,000). The time exponent is the
least-squares slope of log t on log n.

Usage::

    python benchmarks/hodlr_scaling.py --n 16000 32000 65536 131072 --tol 1e-6 \
        --dense 16000 --json benchmarks/results/hodlr_scaling.json
"""

from __future__ import annotations

import argparse

import numpy as np
from machine_unit import machine, measure_unit, median, run_child, write_run

from harness.analysis.scaling import fit_power_law

_HODLR = r"""
import json, resource, sys, time
import numpy as np
from harness.model.kernels import Matern32
from harness.solvers.hodlr import factorize
n, tol, repeats = int(sys.argv[1]), float(sys.argv[2]), int(sys.argv[3])
kernel = Matern32(variance=1.0, lengthscale=0.1, nugget=1e-2)
points = np.random.default_rng(0).random((n, 2))
factorize(points[:2000], kernel, None, tol=1e-6, rng=0)  # load compiled code
walls, cpus, phases = [], [], []
for r in range(repeats):
    t, c = time.perf_counter(), time.process_time()
    f = factorize(points, kernel, None, tol=tol, rng=r)
    walls.append(time.perf_counter() - t)
    cpus.append(time.process_time() - c)
    phases.append(f.timings.to_dict())
    stored = f.nbytes
    ranks = [[x.max, round(x.mean, 1)] for x in f.ranks]
    del f
peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024
print(json.dumps({"seconds": walls, "cpu_seconds": cpus, "phases": phases,
                  "stored_bytes": stored, "peak_bytes": peak, "ranks": ranks}))
"""

_DENSE = r"""
import json, resource, sys, time
import numpy as np
from scipy.linalg import lapack
from harness.model.kernels import Matern32, assemble_lower
from harness.references import DenseCholesky
n = int(sys.argv[1])
kernel = Matern32(variance=1.0, lengthscale=0.1, nugget=1e-2)
points = np.random.default_rng(0).random((n, 2))
chol = DenseCholesky(points, kernel, rng=0)
out = {"reference": dict(chol.seconds), "certificate": chol.certificate}
del chol
t = time.perf_counter()
a = assemble_lower(kernel, points)
t1 = time.perf_counter()
out.update(assembly_seconds=t1 - t)
if n <= 8192:  # one threaded dpotrf call crashes above (cholesky.blocked_cholesky)
    _, info = lapack.dpotrf(a, lower=1, overwrite_a=1, clean=0)
    out.update(dpotrf_seconds=time.perf_counter() - t1, dpotrf_info=int(info))
out.update(peak_bytes=resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024)
print(json.dumps(out))
"""

_FRESH = r"""
import json, time
t0 = time.perf_counter()
import numpy as np
from harness.model.kernels import Matern32, assemble_lower
from harness.solvers.hodlr import factorize
t1 = time.perf_counter()
kernel = Matern32(variance=1.0, lengthscale=0.1, nugget=1e-2)
x = np.random.default_rng(0).random((2000, 2))
out = {"import_seconds": t1 - t0}
for name, call in (("hodlr", lambda: factorize(x, kernel, None, tol=1e-6, rng=0)),
                   ("assemble_lower", lambda: assemble_lower(kernel, x))):
    s = time.perf_counter(); call(); first = time.perf_counter() - s
    s = time.perf_counter(); call(); second = time.perf_counter() - s
    out[name] = {"first": first, "second": second, "overhead": first - second}
print(json.dumps(out))
"""


def fit_exponent(ns: list[int], ts: list[float]) -> float:
    """Slope b of log t = a + b log n: the project's power-law fit
    (``harness.analysis.scaling.fit_power_law``) from three sizes on, the two-point slope
    log(t2/t1)/log(n2/n1) with two."""
    if len(set(ns)) >= 3:
        return fit_power_law(ns, ts).slope
    return float(np.log(ts[-1] / ts[0]) / np.log(ns[-1] / ns[0]))


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--n", type=int, nargs="*", default=[16000, 32000, 65536, 131072])
    parser.add_argument("--tol", type=float, nargs="+", default=[1e-6])
    parser.add_argument("--repeats", type=int, default=3,
                        help="factorizations per (n, tol) up to n = 32,768 (median)")
    parser.add_argument("--large-repeats", type=int, default=1,
                        help="factorizations per (n, tol) above n = 32,768")
    parser.add_argument("--dense", type=int, nargs="*", default=[16000])
    parser.add_argument("--no-fresh", action="store_true", help="skip the first-call check")
    parser.add_argument("--json", default="benchmarks/results/hodlr_scaling.json")
    args = parser.parse_args(argv)
    info = machine()
    unit = measure_unit()
    u = unit["seconds"]
    print(f"unit: {unit['name']} = {u:.3f} s (load average {info['load_average']})")
    rows: list[dict] = []
    for tol in args.tol:
        for n in args.n:
            reps = args.repeats if n <= 32768 else args.large_repeats
            r = run_child(_HODLR, str(n), str(tol), str(reps))
            row = {"kind": "hodlr", "n": n, "tol": tol, **r}
            if "error" not in r:
                row["median_seconds"] = median(r["seconds"])
                row["median_units"] = row["median_seconds"] / u
                row["peak_gb"] = r["peak_bytes"] / 1e9
                row["stored_gb"] = r["stored_bytes"] / 1e9
                print(f"n {n:>8} tol {tol:.0e}: {row['median_seconds']:.2f} s = "
                      f"{row['median_units']:.2f} units (cpu {median(r['cpu_seconds']):.1f} s), "
                      f"stored {row['stored_gb']:.3f} GB, peak {row['peak_gb']:.2f} GB",
                      flush=True)
            else:
                print(f"n {n:>8} tol {tol:.0e}: failed: {r['error']}", flush=True)
            rows.append(row)
    fits = []
    for tol in args.tol:
        ok = [r for r in rows if r["kind"] == "hodlr" and r["tol"] == tol and "median_seconds" in r]
        if len(ok) >= 2:
            b = fit_exponent([r["n"] for r in ok], [r["median_seconds"] for r in ok])
            fits.append({"tol": tol, "n": [r["n"] for r in ok], "exponent": b})
            print(f"time exponent at tol {tol:g}: {b:.3f}")
    for n in args.dense:
        d = run_child(_DENSE, str(n))
        row = {"kind": "dense", "n": n, **d}
        if "error" not in d:
            ref = d["reference"]
            if "dpotrf_seconds" not in d:
                # one threaded dpotrf call segfaults at n = 16,000 on this machine (OpenBLAS
                # 0.3.30), so the call is estimated from the same-run unit by n^3 scaling
                d["dpotrf_seconds"] = u * (n / unit["n"]) ** 3
                row["dpotrf_seconds_estimated"] = "unit x (n / 8,192)^3"
            row["dpotrf_seconds"] = d["dpotrf_seconds"]
            row["reference_over_dpotrf"] = (ref["factor"] + ref.get("certify", 0.0)) / d[
                "dpotrf_seconds"]
            row["dpotrf_units"] = d["dpotrf_seconds"] / u
            print(f"dense n {n}: reference factor {ref['factor']:.2f} s + certificate "
                  f"{ref.get('certify', 0.0):.2f} s over one dpotrf {d['dpotrf_seconds']:.2f} s"
                  f" = {row['reference_over_dpotrf']:.2f}", flush=True)
            for h in rows:
                if h["kind"] == "hodlr" and h["n"] == n and "median_seconds" in h:
                    key = f"speedup_tol_{h['tol']:g}"
                    row[key] = (d["assembly_seconds"] + d["dpotrf_seconds"]) / h["median_seconds"]
                    print(f"  speed-up over assembly + one dpotrf at tol {h['tol']:g}: "
                          f"{row[key]:.1f}x")
        rows.append(row)
    fresh = None if args.no_fresh else run_child(_FRESH)
    if fresh:
        print(f"fresh process first-call overhead: hodlr {fresh['hodlr']['overhead']:.2f} s, "
              f"assemble_lower {fresh['assemble_lower']['overhead']:.2f} s")
    write_run(args.json, "hodlr_scaling", argv, info, unit=unit, rows=rows, exponents=fits,
              fresh_process=fresh)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
