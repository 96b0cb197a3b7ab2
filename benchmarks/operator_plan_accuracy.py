"""Benchmark: the check's plan for the exact-operator reference against the measured stage.

``covaudit check`` prices its reference stage before it starts (``harness.check.cost_plan``):
for the exact operator, the preconditioner at all points (its factorization and traces),
the products of one evaluation with the score, the preconditioner at the conditioning
points, and the kriging solves, each product call priced at its width from the
calibration's ``ProductCost`` (``harness.references.operator.product_cost``). This script
plans a check with ``--reference operator`` and fixed parameters at each size, then runs
the check's own reference stage (``harness.audit.audit_references.OperatorReference``, the
same object the check builds) ``--repeats`` times, and records the plan's seconds and
peak memory, the measured median seconds and the largest peak resident memory above the
process's resident memory before the stage, and their ratios (the issue's criterion for
the plan: time within 2x, memory within 1.5x). A warm-up stage on 1,024 of the points
runs first, unmeasured, so that loading the compiled kernels is not counted: in the
check they are loaded before the stage.

The data: the scattered 2D points of ``check_at_scale.py`` (uniform on [0, 1000]^2,
values 10 + f + 0.1 e with f a Matern 3/2 field of length scale 50 drawn by random
Fourier features), audited at variance 1, length scale 50 and nugget 0.01, constant
mean, the check's default holdout (10%, at most 2,000) and 256 variance points.

Run::

    python benchmarks/operator_plan_accuracy.py --sizes 8192,16384 --repeats 3 \
        --json benchmarks/results/operator_plan_accuracy.json
"""

from __future__ import annotations

import argparse
import gc
import statistics
import sys
import time
from pathlib import Path

import numpy as np
import psutil

sys.path.insert(0, str(Path(__file__).resolve().parent))
from check_at_scale import MEMORY_FACTOR, TIME_FACTOR, synthetic_field, within  # noqa: E402
from co2_check import TreeMemory  # noqa: E402
from machine_unit import machine, measure_unit, write_run  # noqa: E402

PARAMETERS = {"variance": 1.0, "lengthscale": 50.0, "nugget": 0.01}


def _audit_data(points: np.ndarray, values: np.ndarray, seed: int):
    from harness.audit.audit_sampling import holdout_size, variance_positions
    from harness.audit.engine import AuditData
    from harness.model.kernels import Matern32

    n = points.shape[0]
    rng = np.random.default_rng(seed)
    holdout = np.sort(rng.choice(n, size=holdout_size(n, 0.1), replace=False))
    return AuditData(points=points, y=values, kernel=Matern32(**PARAMETERS), mean="constant",
                     holdout=holdout, fisher=None, probes=np.empty((n, 0)),
                     variance_at=variance_positions(holdout.size, seed=seed))


def measure_size(n: int, *, repeats: int, seed: int) -> dict:
    from harness.audit.audit_references import OperatorReference
    from harness.check.check_options import CheckOptions
    from harness.check.cost_plan import plan_check

    points, values = synthetic_field(n, 2, 50.0, np.random.default_rng(seed))
    options = CheckOptions(fixed_params=dict(PARAMETERS), tolerances=(1e-6,), refit=False,
                           reference="operator")
    plan = plan_check(points, values, options, rng=np.random.default_rng(seed))
    stage = next(s for s in plan.stages if s.stage == "reference")
    # a warm-up on 1,024 of the points loads the compiled kernels, as the check's fork
    # server has them loaded before the stage (their code would count as the stage's)
    OperatorReference(_audit_data(points[:1024], values[:1024], seed), base_seed=seed)
    data = _audit_data(points, values, seed)
    runs = []
    for _ in range(repeats):
        gc.collect()
        before = psutil.Process().memory_info().rss
        memory = TreeMemory(psutil.Process().pid, every=0.2)
        start = time.perf_counter()
        reference = OperatorReference(data, base_seed=seed)
        seconds = time.perf_counter() - start
        peak = memory.stop()
        runs.append({"seconds": seconds, "peak_above_start_bytes": max(peak - before, 0),
                     "certified": bool(reference.info.certified),
                     "description": reference.info.description})
        del reference
    measured = statistics.median(r["seconds"] for r in runs)
    peak = max(r["peak_above_start_bytes"] for r in runs)
    if stage.seconds is None or stage.peak_bytes is None:
        raise RuntimeError(f"the plan predicted no reference stage at n = {n}: {stage.detail}")
    return {"n": n, "plan": {"seconds": stage.seconds, "peak_bytes": stage.peak_bytes,
                             "detail": stage.detail,
                             "calibration": plan.calibration.to_dict()},
            "measured_median_seconds": measured, "measured_peak_above_start_bytes": peak,
            "runs": runs, "measured_over_predicted": {"time": measured / stage.seconds,
                                                      "memory": peak / stage.peak_bytes},
            "time_within_2x": within(stage.seconds, measured, TIME_FACTOR),
            "memory_within_1.5x": within(stage.peak_bytes, peak, MEMORY_FACTOR)}


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__,
                                     formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--sizes", default="8192,16384")
    parser.add_argument("--repeats", type=int, default=3)
    parser.add_argument("--unit-repeats", type=int, default=3)
    parser.add_argument("--seed", type=int, default=7)
    parser.add_argument("--json", default="benchmarks/results/operator_plan_accuracy.json")
    args = parser.parse_args(argv)
    info = machine()
    unit = measure_unit(args.unit_repeats)
    print(f"unit: {unit['seconds']:.2f} s", flush=True)
    sizes = []
    for n in (int(v) for v in args.sizes.split(",")):
        result = measure_size(n, repeats=args.repeats, seed=args.seed)
        result["measured_units"] = result["measured_median_seconds"] / unit["seconds"]
        result["plan_units"] = result["plan"]["seconds"] / unit["seconds"]
        print(f"n = {n:,}: plan {result['plan']['seconds']:.1f} s, measured "
              f"{result['measured_median_seconds']:.1f} s (ratio "
              f"{result['measured_over_predicted']['time']:.2f}); memory ratio "
              f"{result['measured_over_predicted']['memory']:.2f}", flush=True)
        sizes.append(result)
    passed = all(s["time_within_2x"] and s["memory_within_1.5x"] for s in sizes)
    write_run(args.json, "operator_plan_accuracy", argv, info, unit=unit,
              problem={"points": "uniform on [0, 1000]^2", "kernel": "matern32",
                       "parameters": PARAMETERS, "mean": "constant",
                       "stage": "the check's reference stage (OperatorReference)"},
              sizes=sizes, passed=passed)
    return 0 if passed else 1


if __name__ == "__main__":
    raise SystemExit(main())
