"""How close is check's reported estimate to an independent dense MLE? (accuracy; the fit
time is recorded beside the same-run unit, one dense Cholesky at n = 8,192).

Rows: the dense exact fit (the check's path while it fits the budgets) and, for
comparison, the compressed fit forced by ``dense_fit_max_n = 0``. The datasets and the
independent MLE (scipy.optimize.minimize + numpy/scipy linear algebra,
no project code) are those of ``tests/test_fit_accuracy.py``; this script records the
gaps in nats and in standard errors, which the test only bounds (0.01 nat, 0.02 SE).

Run: ``python benchmarks/fit_accuracy.py`` (writes ``benchmarks/results/fit_accuracy.json``).
"""

from __future__ import annotations

import json
import os
import platform
import sys
import time
from pathlib import Path

import numpy as np
import scipy
import scipy.linalg
from scipy import optimize

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests"))
sys.path.insert(0, str(Path(__file__).resolve().parent))

from operator_common import cholesky_unit, cpu_description  # noqa: E402
from test_fit_accuracy import IndependentModel, _data  # noqa: E402

from harness import __version__  # noqa: E402
from harness.check import CheckOptions, run_check, validate  # noqa: E402
from harness.check.datafile import observations_from_arrays  # noqa: E402

OUT = Path(__file__).resolve().parent / "results" / "fit_accuracy.json"
CASES = (("matern32", 11, "dense"), ("exponential", 12, "dense"),
         ("exponential", 12, "compressed"))
#: Keeps the fit on the dense path whatever the machine's load (its estimate follows it).
FIT_BUDGET = 7200.0


def main() -> int:
    unit = cholesky_unit()["median_seconds"]
    rows = []
    for family, seed, path in CASES:
        x, y, truth = _data(family, seed)
        model = IndependentModel(x, y, family)
        start = np.log([truth["variance"], truth["lengthscale"], truth["nugget"]])
        res = optimize.minimize(model.objective, start, jac=True, method="L-BFGS-B",
                                options={"maxiter": 500, "ftol": 1e-14, "gtol": 1e-9})
        se = np.sqrt(np.diag(np.linalg.inv(model.fisher(res.x))))
        data = validate(observations_from_arrays(x, y, source="synthetic"))
        t0 = time.perf_counter()
        result = run_check(data, CheckOptions(kernel=family, tolerances=(1e-8,),
                                              solver_seeds=1, refit=False,
                                              fit_time_budget=FIT_BUDGET,
                                              dense_fit_max_n=None if path == "dense"
                                              else 0),
                           source="synthetic")
        seconds = time.perf_counter() - t0
        p = result.params
        theta = np.log([p["variance"], p["lengthscale"], p["nugget"]])
        row = {"kernel": family, "n": int(y.size), "seed": seed,
               "loglik_gap_nat": float(result.loglik - (-res.fun)),
               "max_param_gap_se": float(np.max(np.abs(theta - res.x) / se)),
               "param_gap_se": (np.abs(theta - res.x) / se).tolist(),
               "independent_success": bool(res.success),
               "fit_engine": result.fit["plan"]["engine"],
               "fit_converged": result.fit_converged,
               "fit_step_se": result.fit.get("step_se"),
               "fit_score_tol_se": result.fit.get("score_tol_se"),
               "warnings": list(result.warnings),
               "check_seconds": seconds, "check_in_units": seconds / unit}
        rows.append(row)
        print(json.dumps(row))
    out = {"benchmark": "fit_accuracy", "harness_version": __version__,
           "machine": {"cpu": cpu_description(), "cores": os.cpu_count(),
                       "platform": platform.platform(), "python": sys.version.split()[0]},
           "threads": {k: os.environ.get(k) for k in ("OMP_NUM_THREADS",
                                                      "OPENBLAS_NUM_THREADS",
                                                      "NUMBA_NUM_THREADS")},
           "versions": {"numpy": np.__version__, "scipy": scipy.__version__},
           "unit": {"what": "median scipy.linalg.cho_factor at n = 8192, 3 repeats",
                    "seconds": unit},
           "rows": rows}
    OUT.parent.mkdir(parents=True, exist_ok=True)
    OUT.write_text(json.dumps(out, indent=2) + "\n", encoding="utf-8")
    print(f"wrote {OUT}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
