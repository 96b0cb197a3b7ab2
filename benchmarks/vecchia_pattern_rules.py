"""Accuracy of the Vecchia solver's two pattern rules at equal cost, under a nugget.

Why the solver's knob counts nearest earlier points instead of the radius rule: for each
``--n`` and seed (2D uniform points, Matern 3/2, s2 = 1, l = 0.1, nugget 1e-2) the radius
rule at each ``--rho`` is paired with the nearest rule at the m that gives no more
nonzeros per column (m = the radius rule's mean set size), both without supernodes, and
the exact KL(N(0, Sigma) || N(0, Sigma~)) of each is measured from the dense Cholesky
factor (``harness.audit.metrics.kl_divergence``); then the nearest rule over
``--neighbours`` with the default supernodes (lam = 1.5), giving the KL fall per step.
Medians over seeds. Accuracy only: nothing is timed, so no unit is measured.

Run::

    python benchmarks/vecchia_pattern_rules.py --n 2048 4096 --seeds 3 \
        --json benchmarks/results/vecchia_pattern_rules.json
"""

from __future__ import annotations

import argparse

import numpy as np
import scipy.linalg as sl
from machine_unit import machine, median, write_run

from harness.audit.metrics.kl_divergence import kl_divergence_exact
from harness.model.kernels import Matern32
from harness.solvers.vecchia import build_structure, factorize, maximin_order

KERNEL = Matern32(variance=1.0, lengthscale=0.1, nugget=1e-2)


def one_seed(n: int, seed: int, rhos: list[float], counts: list[int]) -> dict:
    """KL and nonzeros per column of both rules at one point set."""
    points = np.random.default_rng(seed).random((n, 2))
    lower = sl.cholesky(KERNEL.covariance(points), lower=True, check_finite=False)
    order = maximin_order(points)

    def kl_of(**rule: object) -> tuple[float, float]:
        s = build_structure(points, order=order, **rule)  # type: ignore[arg-type]
        f = factorize(points, KERNEL, structure=s, lam=s.groups.lam)
        return kl_divergence_exact(f, cholesky=lower).value, s.nnz_per_column

    pairs = []
    for rho in rhos:
        kl_r, nnz_r = kl_of(rho=rho, lam=None)
        m = max(1, int(nnz_r) - 1)          # the diagonal is one of the nonzeros
        kl_m, nnz_m = kl_of(neighbours=m, lam=None)
        pairs.append({"rho": rho, "radius_nnz_per_column": nnz_r, "radius_kl": kl_r,
                      "neighbours": m, "nearest_nnz_per_column": nnz_m, "nearest_kl": kl_m})
    sweep = []
    for m in counts:
        kl, nnz = kl_of(neighbours=m, lam=1.5)
        sweep.append({"neighbours": m, "nnz_per_column": nnz, "kl": kl})
    return {"pairs": pairs, "sweep": sweep}


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--n", type=int, nargs="+", default=[2048, 4096])
    parser.add_argument("--seeds", type=int, default=3)
    parser.add_argument("--rho", type=float, nargs="+", default=[4.0, 6.0, 9.0])
    parser.add_argument("--neighbours", type=int, nargs="+", default=[5, 10, 20, 40, 80])
    parser.add_argument("--json", default="benchmarks/results/vecchia_pattern_rules.json")
    args = parser.parse_args(argv)
    info = machine()
    sizes = []
    for n in args.n:
        runs = [one_seed(n, seed, args.rho, args.neighbours) for seed in range(args.seeds)]
        pairs = []
        for i, rho in enumerate(args.rho):
            rows = [r["pairs"][i] for r in runs]
            pairs.append({key: median([row[key] for row in rows]) for key in rows[0]}
                         | {"rho": rho})
        sweep = []
        for i, m in enumerate(args.neighbours):
            rows = [r["sweep"][i] for r in runs]
            sweep.append({"neighbours": m,
                          "median_nnz_per_column": median([r["nnz_per_column"] for r in rows]),
                          "median_kl": median([r["kl"] for r in rows])})
        falls = [a["median_kl"] / b["median_kl"] for a, b in zip(sweep, sweep[1:],
                                                                strict=False)]
        for p in pairs:
            print(f"n {n} rho {p['rho']:g}: radius KL {p['radius_kl']:.3g} at "
                  f"{p['radius_nnz_per_column']:.1f}/col; nearest m={p['neighbours']:g} KL "
                  f"{p['nearest_kl']:.3g} at {p['nearest_nnz_per_column']:.1f}/col",
                  flush=True)
        print(f"n {n} sweep KL falls per step: {[round(f, 2) for f in falls]}", flush=True)
        sizes.append({"n": n, "seeds": args.seeds, "pairs": pairs, "sweep": sweep,
                      "kl_fall_per_step": falls})
    write_run(args.json, "vecchia_pattern_rules", argv, info, sizes=sizes,
              notes=["2D uniform points, Matern 3/2, s2 = 1, l = 0.1, nugget 1e-2",
                     "pairs: no supernodes; sweep: supernodes lam = 1.5",
                     "medians over seeds"])
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
