"""The exact operator's preconditioner: Vecchia (m chosen by the pilot) against HODLR.

Problem: 2D uniform points, Matern 3/2, s2 = 1, l = 0.1, nugget 1e-2 (the issue's
setting). For each ``--n`` and each preconditioner (``hodlr`` at tol 1e-10, the earlier
default; ``vecchia`` with its neighbour count chosen by
``harness.audit.operator_preconditioner.pilot_neighbours``), ``--repeats`` fresh child
processes each build the preconditioner (timed, the pilot included) and run
``operator_evaluate`` with score (SE target 0.02 nat), recording total seconds,
iterations (CG plus Lanczos steps), exact products, probes, the log-likelihood with its SE
and peak resident memory (``resource.getrusage``, the child's high-water mark). Medians
over the repeats, and the ratios vecchia / hodlr. The unit is one dpotrf at n = 8,192 in
the same run (``machine_unit``).

Usage::

    python benchmarks/operator_preconditioner.py --n 16384 --repeats 3 \
        --json benchmarks/results/operator_preconditioner.json
"""

from __future__ import annotations

import argparse

from machine_unit import machine, measure_unit, median, run_child, write_run

_RUN = r"""
import json, resource, sys, time
import numpy as np
from harness.audit.operator_preconditioner import (
    PreconditionerSpec, build_operator_preconditioner)
from harness.model.kernels import Matern32
from harness.references.operator import operator_evaluate
n, family = int(sys.argv[1]), sys.argv[2]
kernel = Matern32(variance=1.0, lengthscale=0.1, nugget=1e-2)
rng = np.random.default_rng(0)
points = rng.random((n, 2))
y = rng.standard_normal(n)
small = rng.random((500, 2))
operator_evaluate(small, y[:500], kernel, rng=0, max_probes=16, score=True, progress=False,
                  preconditioner=build_operator_preconditioner(
                      small, kernel, PreconditionerSpec(family=family),
                      rng=np.random.default_rng(1)).factorization)  # load compiled code
start = time.perf_counter()
built = build_operator_preconditioner(points, kernel, PreconditionerSpec(family=family),
                                      rng=np.random.default_rng(1))
pre_seconds = time.perf_counter() - start
ev = operator_evaluate(points, y, kernel, preconditioner=built.factorization, rng=2,
                       score=True, progress=False)
out = {"n": n, "family": built.family, "knob": built.knob_name,
       "knob_value": built.knob_value, "seconds": time.perf_counter() - start,
       "preconditioner_seconds": pre_seconds,
       "pilot": None if built.pilot is None else built.pilot.to_dict(),
       "preconditioner_nbytes": int(built.factorization.nbytes),
       "iterations": ev.iterations, "products": ev.products, "probes": ev.probes,
       "loglik": ev.loglik, "loglik_se": ev.loglik_se, "quadratic_bound": ev.quadratic_bound,
       "converged": ev.converged, "phases": dict(ev.phases),
       "peak_bytes": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024}
print(json.dumps(out))
"""

FAMILIES = ("hodlr", "vecchia")
MEDIAN_KEYS = ("seconds", "preconditioner_seconds", "iterations", "products", "probes",
               "peak_bytes")


def one_size(n: int, repeats: int, unit_seconds: float) -> dict:
    """Every repeat of both families at ``n``, their medians and the ratios."""
    runs: dict[str, list[dict]] = {family: [] for family in FAMILIES}
    for _ in range(repeats):
        for family in FAMILIES:
            out = run_child(_RUN, str(n), family)
            if "error" in out:
                raise RuntimeError(f"{family} at n = {n}: {out['error']}")
            print(f"n = {n:,} {family}: {out['seconds']:.1f} s, "
                  f"{out['iterations']} iterations, {out['peak_bytes'] / 2**30:.2f} GiB",
                  flush=True)
            runs[family].append(out)
    medians = {family: {key: median([float(r[key]) for r in rows]) for key in MEDIAN_KEYS}
               for family, rows in runs.items()}
    for row in medians.values():
        row["units"] = row["seconds"] / unit_seconds
    ratios = {key: medians["vecchia"][key] / medians["hodlr"][key] for key in MEDIAN_KEYS}
    return {"n": n, "runs": runs, "medians": medians, "ratio_vecchia_over_hodlr": ratios}


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--n", type=int, nargs="+", default=[16384])
    parser.add_argument("--repeats", type=int, default=3)
    parser.add_argument("--json", default="benchmarks/results/operator_preconditioner.json")
    args = parser.parse_args(argv)
    info = machine()
    unit = measure_unit()
    sizes = [one_size(n, args.repeats, unit["seconds"]) for n in args.n]
    write_run(args.json, "operator_preconditioner", argv, info, unit=unit,
              problem="2D uniform points, Matern 3/2, s2 = 1, l = 0.1, nugget 1e-2; "
                      "operator_evaluate with score, SE target 0.02 nat",
              sizes=sizes)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
