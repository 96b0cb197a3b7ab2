"""The exact operator's stated uncertainty against a long-double Kalman truth.

Points: n uniform on [0, 1] (seed 0) on a line; Matern 1/2 and 3/2, s2 = 1, l = 0.1,
nugget 1e-2; data drawn from the model by the float64 state-space recursion (seeds
100..). Preconditioner: the audit's default (HODLR at tol 1e-10), one per kernel,
reused for every seed. Truth: ``harness.references.statespace_longdouble`` (the Kalman
filter in numpy.longdouble) for L, and its Richardson finite-difference score (stated
error ``fd_error``).

Acceptance per kernel: |L_op - L| <= 2 se + b in >= 19 of 20 seeds; the stated total
2 se + b at most 10 x the observed RMS error or at most 1e-12 |L|; the same for each
score component (se + b/2 from ``score_se`` and ``score_bound``, the engine's form).

Usage::

    python benchmarks/operator_honest_se.py [--n 30000] [--seeds 20]

``--first-seed S --kernel matern32`` runs seeds S .. S + seeds - 1 of one kernel (data
seeds 100 + S ..), for a calibration check on more seeds than the acceptance's 20, into
the file given by ``--out``.

Writes benchmarks/results/operator_honest_se.json (machine, threads, same-run unit,
commit).
"""

from __future__ import annotations

import argparse
import math
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))
from machine_unit import machine, measure_unit, write_run  # noqa: E402

from harness.audit.operator_preconditioner import (  # noqa: E402
    PreconditionerSpec,
    build_operator_preconditioner,
)
from harness.model.kernels import Exponential, Kernel, Matern32  # noqa: E402
from harness.references.operator import operator_evaluate  # noqa: E402
from harness.references.statespace import discretize, matern_state_space  # noqa: E402
from harness.references.statespace_longdouble import (  # noqa: E402
    longdouble_loglik,
    longdouble_score,
)


def simulate(x: np.ndarray, kernel: Kernel, rng: np.random.Generator) -> np.ndarray:
    """One draw of the model at sorted points x by the state-space recursion (float64)."""
    model = matern_state_space(kernel)
    trans, noise = discretize(model, np.concatenate([[0.0], np.diff(x)]))
    m = model.m
    state = np.linalg.cholesky(model.pinf) @ rng.standard_normal(m)
    f = np.empty(x.size)
    for i in range(x.size):
        if i:
            w, v = np.linalg.eigh(noise[i])
            state = trans[i] @ state + v @ (np.sqrt(np.maximum(w, 0.0)) * rng.standard_normal(m))
        f[i] = state[0]
    return f + math.sqrt(kernel.nugget) * rng.standard_normal(x.size)


def judge(errors: np.ndarray, totals: np.ndarray, scale: float) -> dict[str, object]:
    """Coverage and sharpness of a stated total 2 se + b against observed errors."""
    rms = float(np.sqrt(np.mean(errors ** 2)))
    median_total = float(np.median(totals))
    covered = int(np.sum(np.abs(errors) <= totals))
    sharp = bool(median_total <= 10 * rms or median_total <= 1e-12 * scale)
    return {"covered": covered, "of": int(errors.size), "rms_error": rms,
            "median_stated_2se_plus_b": median_total, "ratio_to_rms": median_total / rms
            if rms > 0 else None, "sharp": sharp,
            "passed": bool(covered >= math.ceil(0.95 * errors.size) and sharp)}


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--n", type=int, default=30000)
    parser.add_argument("--seeds", type=int, default=20)
    parser.add_argument("--first-seed", type=int, default=0)
    parser.add_argument("--kernel", choices=("both", "exponential", "matern32"),
                        default="both")
    parser.add_argument("--unit-repeats", type=int, default=3)
    parser.add_argument("--out", default="benchmarks/results/operator_honest_se.json")
    args = parser.parse_args(argv)
    info = machine()
    unit = measure_unit(args.unit_repeats)
    x = np.sort(np.random.default_rng(0).random(args.n))
    kernels = [kernel for kernel in (Exponential(variance=1.0, lengthscale=0.1, nugget=1e-2),
                                     Matern32(variance=1.0, lengthscale=0.1, nugget=1e-2))
               if args.kernel in ("both", kernel.family)]
    seeds = range(args.first_seed, args.first_seed + args.seeds)
    results = []
    for kernel in kernels:
        t0 = time.perf_counter()
        pre = build_operator_preconditioner(x[:, None], kernel, PreconditionerSpec(),
                                            rng=np.random.default_rng(0)).factorization
        pre_s = time.perf_counter() - t0
        ys = np.column_stack([simulate(x, kernel, np.random.default_rng(100 + s))
                              for s in seeds])
        t0 = time.perf_counter()
        truth = longdouble_loglik(x, ys, kernel)
        fd = longdouble_score(x, ys, kernel)
        truth_s = time.perf_counter() - t0
        rows = []
        for j, s in enumerate(seeds):
            ev = operator_evaluate(x[:, None], ys[:, j], kernel, preconditioner=pre, rng=s)
            d_l = ev.loglik - float(truth.loglik[j])
            d_g = np.asarray(ev.score) - fd.score[:, j]
            g_total = 2 * np.asarray(ev.score_se) + np.asarray(ev.score_bound) + fd.error[:, j]
            rows.append({
                "seed": s, "loglik": ev.loglik, "truth_loglik": float(truth.loglik[j]),
                "dL": d_l, "loglik_se": ev.loglik_se, "loglik_bound": ev.loglik_bound,
                "within": bool(abs(d_l) <= 2 * ev.loglik_se + ev.loglik_bound),
                "dQ": ev.quadratic - float(truth.quadratic[j]),
                "dlogdet": ev.logdet - float(truth.logdet),
                "terms": {k: v["value"] for k, v in ev.uncertainty.items()
                          if isinstance(v, dict)},
                "score": list(map(float, ev.score)), "truth_score": list(fd.score[:, j]),
                "dscore": list(map(float, d_g)), "score_se": list(map(float, ev.score_se)),
                "score_bound": list(map(float, ev.score_bound)),
                "fd_error": list(fd.error[:, j]), "score_total": list(map(float, g_total)),
                "probes": ev.probes, "iterations": ev.iterations, "seconds": ev.seconds,
                "converged": ev.converged})
            print(f"{kernel.family} seed {s:2d}: dL {d_l:+.2e} se {ev.loglik_se:.2e} "
                  f"b {ev.loglik_bound:.1e} dg {np.abs(d_g).max():.2e} {ev.seconds:.1f} s",
                  flush=True)
        d_l = np.array([r["dL"] for r in rows])
        tot = np.array([2 * r["loglik_se"] + r["loglik_bound"] for r in rows])
        scale = float(np.median(np.abs([r["truth_loglik"] for r in rows])))
        score_judge = []
        for i, name in enumerate(kernel.param_names):
            errs = np.array([r["dscore"][i] for r in rows])
            tots = np.array([r["score_total"][i] for r in rows])
            score_judge.append({"param": name} | judge(errs, tots, scale))
        results.append({"kernel": kernel.describe(), "preconditioner_seconds": pre_s,
                        "truth_seconds": truth_s, "loglik": judge(d_l, tot, scale),
                        "score": score_judge, "seeds": rows})
    passed = all(r["loglik"]["passed"] and all(g["passed"] for g in r["score"])
                 for r in results)
    write_run(args.out, "operator_honest_se", argv, info, unit=unit,
              problem={"n": args.n, "seeds": args.seeds, "first_seed": args.first_seed,
                       "kernels": args.kernel, "points": "uniform on [0, 1], seed 0",
                       "data": f"drawn from the model, seeds {100 + args.first_seed}..",
                       "preconditioner": "hodlr tol 1e-10 (audit default)",
                       "truth": "Kalman filter in numpy.longdouble; score by Richardson "
                                "central differences of it (fd_error stated)",
                       "full_run": (args.seeds >= 20 and args.n >= 30000
                                    and args.first_seed == 0 and args.kernel == "both")},
              results=results, passed=passed)
    print("passed" if passed else "FAILED")
    return 0 if passed else 1


if __name__ == "__main__":
    raise SystemExit(main())
