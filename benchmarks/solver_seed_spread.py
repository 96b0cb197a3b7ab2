"""Accuracy spread of the built-in solver over seeds of its randomness (no timings).

On the smoke case's problem (cases/smoke.toml: uniform 2D points, n = 300 and 600,
Matern 3/2, lengthscale 0.2, nugget 1e-3, constant mean, leaf size 64, y drawn from the
model by the dense Cholesky factor), the |log-likelihood error| and |quadratic-form
error| against the dense reference at tol 1e-4 and 1e-8 for solver seeds
``solver_seed(0, i)``, i = 0..7 (``harness.audit.solver_seeds``). It shows how much one
seed's number can differ from another's, hence why a verdict takes the worst of several
seeds and why a stored baseline moves when the seed derivation changes.

Run: ``python benchmarks/solver_seed_spread.py`` (writes
``benchmarks/results/solver_seed_spread.json``).
"""

from __future__ import annotations

import json
import os
import platform
import statistics
import sys
from pathlib import Path

import numpy as np
import scipy

sys.path.insert(0, str(Path(__file__).resolve().parent))
from operator_common import cpu_description  # noqa: E402

from harness import __version__
from harness.audit.solver_seeds import solver_seed
from harness.geometry.pointsets import generate
from harness.likelihood import evaluate_likelihood
from harness.model.kernels import make_kernel
from harness.references import DenseCholesky, dense_evaluate
from harness.solvers.registry import resolve_solver

SEEDS = 8
OUT = Path(__file__).resolve().parent / "results" / "solver_seed_spread.json"


def _stats(values: list[float]) -> dict[str, float]:
    return {"min": min(values), "median": statistics.median(values), "max": max(values),
            "max_over_min": max(values) / min(values) if min(values) > 0 else float("inf")}


def main() -> int:
    kernel = make_kernel("matern32", {"variance": 1.0, "lengthscale": 0.2, "nugget": 1e-3})
    hodlr = resolve_solver("hodlr")
    rows = []
    for n in (300, 600):
        x = generate("uniform", n, 2, rng=np.random.default_rng(1))
        y = DenseCholesky(x, kernel).apply_sqrt(np.random.default_rng(2).standard_normal(n))
        ref = dense_evaluate(x, y, kernel, mean="constant", score=False)
        for tol in (1e-4, 1e-8):
            ll, quad = [], []
            for i in range(SEEDS):
                fac = hodlr.factorize(x, kernel, kernel.theta, tol=tol, leaf_size=64,
                                      rng=solver_seed(0, i))
                ev = evaluate_likelihood(fac, x, y, kernel, mean="constant", score=False)
                ll.append(abs(ev.loglik - ref.loglik))
                quad.append(abs(ev.quadratic - ref.quadratic))
            rows.append({"n": n, "tol": tol, "loglik_abs_err": _stats(ll),
                         "quad_abs_err": _stats(quad), "loglik_values": ll})
            print(f"n={n} tol={tol:g}: |dL| min {min(ll):.3g} median "
                  f"{statistics.median(ll):.3g} max {max(ll):.3g}")
    result = {
        "benchmark": "solver_seed_spread", "harness_version": __version__,
        "machine": {"cpu": cpu_description(), "cores": os.cpu_count(),
                    "platform": platform.platform(),
                    "python": sys.version.split()[0]},
        "threads": {k: os.environ.get(k) for k in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS",
                                                   "MKL_NUM_THREADS", "NUMBA_NUM_THREADS")},
        "versions": {"numpy": np.__version__, "scipy": scipy.__version__},
        "unit": "none (accuracy only, no timings)", "seeds": SEEDS, "rows": rows,
    }
    OUT.parent.mkdir(parents=True, exist_ok=True)
    OUT.write_text(json.dumps(result, indent=2) + "\n", encoding="utf-8")
    print(f"wrote {OUT}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
