"""Log-likelihood + score: the HODLR solver (Hutch++ traces) and the state-space reference.

HODLR: 2D uniform points, Matern 3/2, s2 = 1, l = 0.1, nugget 1e-2, tol 1e-6, values
drawn as white noise; ``evaluate_likelihood`` with Hutch++ (64 products per parameter),
factorization included, median of ``--repeats`` in a fresh subprocess; then the time
per column of one W^-T pass with 21, 42 and 84 columns (the factor's passes are memory-
bound: wider blocks cost less per column, which is why the estimator batches its
quadratic forms); and the Hutchinson estimate (16 probes) of tr(W^-1 Sigma~ W^-T) - n,
the gap in the identity that lets the variance and nugget share one trace operator
(``harness.likelihood.trace.affine``), to set beside the traces' standard errors.
State space: 1D
uniform points, Matern 3/2, log-likelihood + score by the analytic sensitivity
recursions and, for comparison, by finite differences. Seconds and units of the same-run
unit (one dpotrf at n = 8,192, ``machine_unit``).

Usage::

    python benchmarks/likelihood_scaling.py --n 131072 --statespace 1000000 \
        --json benchmarks/results/likelihood_scaling.json
"""

from __future__ import annotations

import argparse

from machine_unit import machine, measure_unit, median, run_child, write_run

_HODLR = r"""
import json, sys, time
import numpy as np
from harness.likelihood import evaluate_likelihood
from harness.likelihood.trace.probes import rademacher_probes
from harness.model.kernels import Matern32
from harness.solvers.hodlr import factorize
n, repeats = int(sys.argv[1]), int(sys.argv[2])
kernel = Matern32(variance=1.0, lengthscale=0.1, nugget=1e-2)
rng = np.random.default_rng(0)
points = rng.random((n, 2))
y = rng.standard_normal(n)
f = factorize(points[:2000], kernel, None, tol=1e-6, rng=0)
evaluate_likelihood(f, points[:2000], y[:2000], kernel, trace="hutchpp", probes=8, rng=0)
walls = []
for r in range(repeats):
    t = time.perf_counter()
    f = factorize(points, kernel, None, tol=1e-6, rng=r)
    t1 = time.perf_counter()
    ev = evaluate_likelihood(f, points, y, kernel, trace="hutchpp", probes=64, rng=r)
    walls.append({"total": time.perf_counter() - t, "factorize": t1 - t})
per_column = {}
for k in (21, 42, 84):
    b = rng.standard_normal((n, k))
    t = time.perf_counter()
    f.solve_sqrt_transpose(b)
    per_column[str(k)] = (time.perf_counter() - t) / k
z = rademacher_probes(n, 16, rng)
gap = np.sum(z * (f.solve_sqrt(f.matvec(f.solve_sqrt_transpose(z))) - z), axis=0)
print(json.dumps({"seconds": [w["total"] for w in walls], "phases": walls,
                  "loglik": ev.loglik, "solves": ev.solves, "matvecs": ev.matvecs,
                  "trace_stderr": ev.trace_stderr.tolist(),
                  "shared_operator_gap": {"mean": float(gap.mean()),
                                          "stderr": float(gap.std(ddof=1) / 4.0)},
                  "solve_sqrt_transpose_seconds_per_column": per_column}))
"""

_STATESPACE = r"""
import json, sys, time
import numpy as np
from harness.model.kernels import Matern32
from harness.references import StateSpaceReference
n, repeats = int(sys.argv[1]), int(sys.argv[2])
kernel = Matern32(variance=1.0, lengthscale=0.01, nugget=1e-2)
rng = np.random.default_rng(0)
x = np.sort(rng.random(n))
y = rng.standard_normal(n)
StateSpaceReference(x[:100], kernel).evaluate(y[:100])  # load compiled code
StateSpaceReference(x[:100], kernel).evaluate(y[:100], score_method="finite_difference")
out = {}
for method in ("analytic", "finite_difference"):
    times = []
    for _ in range(repeats):
        t = time.perf_counter()
        ev = StateSpaceReference(x, kernel).evaluate(y, score_method=method)
        times.append(time.perf_counter() - t)
    out[method] = {"seconds": times, "score": ev.score.tolist()}
print(json.dumps(out))
"""


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--n", type=int, nargs="*", default=[131072])
    parser.add_argument("--statespace", type=int, nargs="*", default=[1_000_000])
    parser.add_argument("--repeats", type=int, default=1)
    parser.add_argument("--json", default="benchmarks/results/likelihood_scaling.json")
    args = parser.parse_args(argv)
    info = machine()
    unit = measure_unit()
    u = unit["seconds"]
    print(f"unit: {unit['name']} = {u:.3f} s (load average {info['load_average']})")
    rows = []
    for n in args.n:
        r = run_child(_HODLR, str(n), str(args.repeats))
        row = {"kind": "hodlr_loglik_score", "n": n, "tol": 1e-6, "trace": "hutchpp",
               "probes": 64, **r}
        if "error" not in r:
            row["median_seconds"] = median(r["seconds"])
            row["median_units"] = row["median_seconds"] / u
            print(f"HODLR loglik + score n {n}: {row['median_seconds']:.2f} s = "
                  f"{row['median_units']:.2f} units", flush=True)
        else:
            print(f"HODLR n {n} failed: {r['error']}")
        rows.append(row)
    for n in args.statespace:
        r = run_child(_STATESPACE, str(n), str(max(1, args.repeats)))
        row = {"kind": "statespace_loglik_score", "n": n, **r}
        if "error" not in r:
            for method in ("analytic", "finite_difference"):
                sec = median(r[method]["seconds"])
                row[f"{method}_median_seconds"] = sec
                row[f"{method}_median_units"] = sec / u
                print(f"state space n {n} ({method}): {sec:.2f} s = {sec / u:.3f} units",
                      flush=True)
        rows.append(row)
    write_run(args.json, "likelihood_scaling", argv, info, unit=unit, rows=rows)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
