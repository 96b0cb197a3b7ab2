"""Scaling of the HODLR factorization: time, storage and peak memory against n.

Problem (the performance targets' setting): 2D uniform points, Matern 3/2, s2 = 1,
l = 0.1, nugget 1e-2, leaf size 128. Each (n, tol) runs in a fresh subprocess so the
peak resident memory (``ru_maxrss``) is its own. Optionally the dense reference
(``assemble_lower`` + LAPACK ``dpotrf``) is timed at the given sizes, and the
time exponent is fitted by least squares on log t = a + b log n.

Usage::

    python benchmarks/hodlr_scaling.py --n 16000 32000 64000 128000 --tol 1e-6 \
        --dense 16000
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys

import numpy as np

_CHILD = r"""
import json, resource, sys, time
import numpy as np
from harness.model.kernels import Matern32, assemble_lower
from harness.solvers.hodlr import factorize
n, tol, dense = int(sys.argv[1]), float(sys.argv[2]), sys.argv[3] == "dense"
kernel = Matern32(variance=1.0, lengthscale=0.1, nugget=1e-2)
points = np.random.default_rng(0).random((n, 2))
factorize(points[:3000], kernel, None, tol=1e-6, rng=0)  # load compiled code
out = {"n": n, "tol": tol}
if dense:
    from scipy.linalg import lapack
    from threadpoolctl import threadpool_limits
    t, c = time.perf_counter(), time.process_time()
    a = assemble_lower(kernel, points)
    t1 = time.perf_counter()
    _, info = lapack.dpotrf(a, lower=1, overwrite_a=1, clean=0)
    out.update(dense_s=time.perf_counter() - t, dense_assembly_s=t1 - t, info=int(info),
               cpu_s=time.process_time() - c)
else:
    t, c = time.perf_counter(), time.process_time()
    f = factorize(points, kernel, None, tol=tol, rng=0)
    out.update(wall_s=time.perf_counter() - t, cpu_s=time.process_time() - c,
               **{k + "_s": v for k, v in f.timings.to_dict().items()},
               stored_gb=f.nbytes / 1e9,
               ranks=[[r.max, round(r.mean, 1)] for r in f.ranks])
out["peak_gb"] = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024 / 1e9
print(json.dumps(out))
"""


def run(n: int, tol: float, dense: bool) -> dict:
    proc = subprocess.run([sys.executable, "-c", _CHILD, str(n), str(tol),
                           "dense" if dense else "hodlr"], capture_output=True, text=True,
                          check=False)
    if proc.returncode != 0:
        return {"n": n, "tol": tol, "error": proc.stderr.strip().splitlines()[-1:]}
    return json.loads(proc.stdout.strip().splitlines()[-1])


def fit_exponent(ns: list[int], ts: list[float]) -> float:
    """Least-squares slope b of log t = a + b log n."""
    return float(np.polyfit(np.log(ns), np.log(ts), 1)[0])


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--n", type=int, nargs="+", default=[16000, 32000, 64000, 128000])
    parser.add_argument("--tol", type=float, nargs="+", default=[1e-6])
    parser.add_argument("--dense", type=int, nargs="*", default=[16000])
    parser.add_argument("--json", help="also write the rows to this file")
    args = parser.parse_args(argv)
    rows = []
    print("times are wall-clock seconds; cpu s = CPU seconds of all threads (on a shared "
          "machine, wall time includes waiting for a core)")
    print(f"{'n':>8} {'tol':>7} {'total s':>8} {'cpu s':>7} {'compr s':>8} {'factor s':>8} "
          f"{'stored GB':>9} {'peak GB':>8}  top ranks (max)")
    for tol in args.tol:
        for n in args.n:
            r = run(n, tol, dense=False)
            rows.append(r)
            if "error" in r:
                print(f"{n:>8} {tol:>7.0e}  failed: {r['error']}")
                continue
            print(f"{n:>8} {tol:>7.0e} {r['wall_s']:>8.2f} {r['cpu_s']:>7.2f} "
                  f"{r['compress_s']:>8.2f} "
                  f"{r['factor_s']:>8.2f} "
                  f"{r['stored_gb']:>9.3f} {r['peak_gb']:>8.2f}  "
                  f"{[m for m, _ in r['ranks'][:4]]}", flush=True)
        ok = [r for r in rows if r.get("tol") == tol and "wall_s" in r]
        if len(ok) >= 2:
            exp = fit_exponent([r["n"] for r in ok], [r["wall_s"] for r in ok])
            print(f"fitted time exponent at tol {tol:g} over n = {ok[0]['n']}..{ok[-1]['n']}: "
                  f"{exp:.3f}")
    for n in args.dense:
        d = run(n, 0.0, dense=True)
        rows.append(d)
        if "error" in d:
            print(f"dense n = {n} failed: {d['error']}")
            continue
        line = (f"dense n = {n}: {d['dense_s']:.2f} s (assembly {d['dense_assembly_s']:.2f} s, "
                f"cpu {d['cpu_s']:.1f} s), peak {d['peak_gb']:.2f} GB")
        for r in rows:
            if r.get("n") == n and "wall_s" in r:
                line += f"; speed-up at tol {r['tol']:g}: {d['dense_s'] / r['wall_s']:.1f}x"
        print(line)
    if args.json:
        with open(args.json, "w") as fh:
            json.dump(rows, fh, indent=1)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
