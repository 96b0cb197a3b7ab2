"""Accuracy and speed of the Vecchia solver, in seconds and same-run units.

Problem: 2D uniform points, Matern 3/2, s2 = 1, l = 0.1, nugget 1e-2.

(a) Accuracy at ``--accuracy-n`` over the knob's default sweep (``NEIGHBOURS_KNOB``) and
``--seeds`` point sets: median KL(N(0, Sigma) || N(0, Sigma~)) (exact, from the dense
Cholesky factor; ``harness.audit.metrics.kl_divergence``), median |L~ - L| for values
drawn from the model and for white noise (``_vecchia_loglik``, from the factorization)
against the exact zero-mean Gaussian log-density from the same scipy Cholesky factor
(``_exact_loglik``); then an extended
tight end (``--extend``: m doubles) until the model-values error is below
1e-2 nat or the nonzeros per column reach 1,000 (m grows 1.5x a step, on seed 0 only:
near 1,000 nonzeros per column one value costs minutes), recording which happened.

(b) Speed at each ``--speed-n`` in a fresh child process per size (peak RSS by
``resource.getrusage``): first factorization plus log-likelihood, ordering and neighbour
search included, at ``--neighbours`` (about 30 nonzeros per column); refactorization at new
parameters (structure reused); the same for every sweep value with time / (n nnz^2);
with ``--gradient``, the log-likelihood with exact gradient and Fisher information in
one pass. The unit is one dpotrf at n = 8,192 in the same run (``machine_unit``).

Usage::

    python benchmarks/vecchia_scaling.py \
        --accuracy-n 16384 --seeds 5 --speed-n 65536 131072 1048576 \
        --json benchmarks/results/vecchia_scaling.json
"""

from __future__ import annotations

import argparse
import time

import numpy as np
from machine_unit import machine, measure_unit, median, run_child, write_run

from harness.analysis.scaling import fit_power_law

_SPEED = r"""
import json, resource, sys, time
import numpy as np
from harness.model.kernels import Matern32
from harness.solvers.vecchia import NEIGHBOURS_KNOB, build_structure, factorize
from harness.solvers.vecchia.vecchia_likelihood import vecchia_evaluate
n, m = int(sys.argv[1]), int(sys.argv[2])
sweep, gradient = sys.argv[3] == "1", sys.argv[4] == "1"
kernel = Matern32(variance=1.0, lengthscale=0.1, nugget=1e-2)
rng = np.random.default_rng(0)
points = rng.random((n, 2))
y = rng.standard_normal(n)
small = rng.random((2000, 2))
vecchia_evaluate(small, y[:2000], kernel, neighbours=m)  # load compiled code
out = {"n": n}
t = time.perf_counter()
ev = vecchia_evaluate(points, y, kernel, neighbours=m, score=False, fisher=False)
out["first_loglik_seconds"] = time.perf_counter() - t
out["first_phases"] = dict(ev.seconds)
structure = build_structure(points, neighbours=m)
out["nnz_per_column"] = structure.nnz_per_column
out["structure_phases"] = structure.timings.to_dict()
t = time.perf_counter()
ev2 = vecchia_evaluate(points, y, kernel.with_theta(kernel.theta + 0.05), neighbours=m,
                       score=False, fisher=False, structure=structure)
out["refactor_loglik_seconds"] = time.perf_counter() - t
t = time.perf_counter()
f = factorize(points, kernel, neighbours=m, structure=structure)
out["refactor_factor_seconds"] = time.perf_counter() - t
del f
if gradient:
    t = time.perf_counter()
    ev3 = vecchia_evaluate(points, y, kernel, neighbours=m, structure=structure)
    out["loglik_gradient_fisher_seconds"] = time.perf_counter() - t
if sweep:
    rows = []
    for r in NEIGHBOURS_KNOB.default_sweep:
        t = time.perf_counter()
        s = build_structure(points, neighbours=int(r), order=structure.order)
        t1 = time.perf_counter()
        vecchia_evaluate(points, y, kernel, structure=s, score=False, fisher=False)
        t2 = time.perf_counter()
        rows.append({"neighbours": int(r), "nnz_per_column": s.nnz_per_column,
                     "structure_seconds": t1 - t, "loglik_seconds": t2 - t1,
                     "seconds_per_n_nnz2": (t2 - t1) / (n * s.nnz_per_column ** 2)})
    out["sweep"] = rows
out["peak_bytes"] = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024
print(json.dumps(out))
"""


def _exact_loglik(lower: np.ndarray, y: np.ndarray) -> float:
    """log N(y; 0, L L') = -1/2 |L^-1 y|^2 - sum log L_ii - n/2 log(2 pi)
    (Rasmussen and Williams 2006, Algorithm 2.1), from scipy's Cholesky factor L."""
    import scipy.linalg as sl

    z = sl.solve_triangular(lower, y, lower=True, check_finite=False)
    return float(-0.5 * z @ z - np.sum(np.log(np.diag(lower)))
                 - 0.5 * y.size * np.log(2.0 * np.pi))


def _vecchia_loglik(factorization, y: np.ndarray) -> float:
    """log N(y; 0, Sigma~) = -1/2 |W^-1 y|^2 - 1/2 log det Sigma~ - n/2 log(2 pi) for
    Sigma~ = W W' (the Vecchia factorization's ``solve_sqrt`` and ``logdet``)."""
    z = factorization.solve_sqrt(y)
    return float(-0.5 * z @ z - 0.5 * factorization.logdet()
                 - 0.5 * y.size * np.log(2.0 * np.pi))


def accuracy(n: int, seeds: int, extend: bool) -> dict:
    """Part (a): KL and log-likelihood errors over the sweep (module docstring)."""
    import scipy.linalg as sl

    from harness.audit.metrics.kl_divergence import kl_divergence_exact
    from harness.model.kernels import Matern32
    from harness.solvers.vecchia import (
        NEIGHBOURS_KNOB,
        build_structure,
        factorize,
        maximin_order,
    )
    kernel = Matern32(variance=1.0, lengthscale=0.1, nugget=1e-2)
    per_m: dict[int, dict[str, list[float]]] = {}
    stop_reason = None
    for seed in range(seeds):
        rng = np.random.default_rng(seed)
        points = rng.random((n, 2))
        lower = sl.cholesky(kernel.covariance(points), lower=True, overwrite_a=True,
                            check_finite=False)
        model_y = lower @ rng.standard_normal(n)
        white = rng.standard_normal(n)
        ref_model = _exact_loglik(lower, model_y)
        ref_white = _exact_loglik(lower, white)
        order = maximin_order(points)
        # seed 0 alone extends the tight end (m grows 1.5x past the sweep): at 16,384
        # points a value near 1,000 nonzeros per column costs several minutes a seed
        sweep = [int(v) for v in NEIGHBOURS_KNOB.default_sweep]
        k = 0
        while k < len(sweep):
            m = sweep[k]
            s = build_structure(points, neighbours=m, order=order)
            f = factorize(points, kernel, structure=s)
            kl = kl_divergence_exact(f, cholesky=lower).value
            em = abs(_vecchia_loglik(f, model_y) - ref_model)
            ew = abs(_vecchia_loglik(f, white) - ref_white)
            entry = per_m.setdefault(m, {"kl": [], "model": [], "white": [], "nnz": []})
            entry["kl"].append(kl)
            entry["model"].append(em)
            entry["white"].append(ew)
            entry["nnz"].append(s.nnz_per_column)
            print(f"seed {seed} m {m}: nnz/col {s.nnz_per_column:.1f} KL {kl:.3e} "
                  f"|dL| model {em:.3e} white {ew:.3e}", flush=True)
            if extend and seed == 0 and k == len(sweep) - 1:
                if em < 1e-2:
                    stop_reason = f"model-values error {em:.2e} < 1e-2 nat at m = {m}"
                elif s.nnz_per_column >= 1000:
                    stop_reason = f"nonzeros per column {s.nnz_per_column:.0f} >= 1,000"
                else:
                    sweep.append(int(round(1.5 * m)))
            k += 1
        del lower
    rows = []
    for m in sorted(per_m):
        e = per_m[m]
        rows.append({"neighbours": m, "nnz_per_column": median(e["nnz"]),
                     "median_kl": median(e["kl"]),
                     "median_abs_loglik_error_model": median(e["model"]),
                     "median_abs_loglik_error_white": median(e["white"]),
                     "seeds": len(e["kl"])})
    sweep_rows = rows[:len(NEIGHBOURS_KNOB.default_sweep)]
    extended = rows[len(sweep_rows):]
    ratios = [a["median_kl"] / b["median_kl"] for a, b in zip(sweep_rows, sweep_rows[1:],
                                                             strict=False)]
    return {"n": n, "seeds": seeds, "sweep": sweep_rows, "kl_fall_per_step": ratios,
            "extended": extended, "extended_stop": stop_reason,
            "extended_note": "seed 0 only: m grows 1.5x past the sweep until its "
                             "model-values error is below 1e-2 nat or its nonzeros per "
                             "column reach 1,000"}


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--accuracy-n", type=int, default=16384)
    parser.add_argument("--seeds", type=int, default=5)
    parser.add_argument("--no-extend", action="store_true")
    parser.add_argument("--speed-n", type=int, nargs="*", default=[65536, 131072, 1048576])
    parser.add_argument("--neighbours", type=int, default=14,
                        help="m of the speed runs (about 30 nonzeros per column in 2D)")
    parser.add_argument("--gradient-from", type=int, default=1048576,
                        help="also time gradient + Fisher from this n up")
    parser.add_argument("--sweep-n", type=int, default=131072)
    parser.add_argument("--repeats", type=int, default=3, help="unit repeats")
    parser.add_argument("--json", default="benchmarks/results/vecchia_scaling.json")
    args = parser.parse_args(argv)
    info = machine()
    unit = measure_unit(args.repeats)
    u = unit["seconds"]
    speed = []
    for n in args.speed_n:
        t = time.perf_counter()
        out = run_child(_SPEED, str(n), str(args.neighbours), "1" if n == args.sweep_n else "0",
                        "1" if n >= args.gradient_from else "0")
        out["child_wall_seconds"] = time.perf_counter() - t
        for key in ("first_loglik_seconds", "refactor_loglik_seconds",
                    "refactor_factor_seconds", "loglik_gradient_fisher_seconds"):
            if key in out:
                out[key.replace("seconds", "units")] = out[key] / u
        print(n, out, flush=True)
        speed.append(out)
    # after the speed children: a child forked from a parent that held the dense
    # matrices inherits its resident-set high-water mark (ru_maxrss)
    acc = accuracy(args.accuracy_n, args.seeds, not args.no_extend) if args.seeds else None
    exponent = None
    ok = [s for s in speed if "first_loglik_seconds" in s and s["n"] >= 65536]
    if len(ok) >= 2:
        fit = fit_power_law([s["n"] for s in ok], [s["first_loglik_seconds"] for s in ok])
        exponent = {"sizes": list(fit.sizes), "slope": fit.slope,
                    "of": "first factorization + log-likelihood, n >= 65,536"}
    write_run(args.json, "vecchia_scaling", argv, info, unit=unit, accuracy=acc,
              speed=speed, time_exponent=exponent,
              notes=["units: one dpotrf at n = 8,192 in this run",
                     f"speed runs at neighbours = {args.neighbours} with lam = 1.5"])
    return 0


if __name__ == "__main__":
    raise SystemExit(main())

