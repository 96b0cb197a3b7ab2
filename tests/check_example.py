"""A hand-made check result for report tests (no fit is run; nothing here is measured).

Four tolerances: 1e-2 fails the log-likelihood limit, 1e-3 broke down with a long
message, 1e-4 is unresolved on the parameter shift, 1e-6 and 1e-8 are safe; the
recommendation is 1e-6 at 3.2x over dense (0.8 s dense, 0.25 s compressed).
"""

from __future__ import annotations

import numpy as np

from harness.check.check_records import CheckResult, MetricValue, ToleranceResult

BREAKDOWN = ("compression lost positive definiteness at level 3 of the cluster tree "
             "while merging the off-diagonal blocks of node 17; try a tighter tolerance")


def _row(tol: float, *, status: str, loglik: float, shift: float, krig: float,
         seconds: float, speedup: float, error: str = "",
         failing: str = "") -> ToleranceResult:
    metrics = () if error else (
        MetricValue("loglik_error", loglik, 0.1, 0.0),
        MetricValue("param_shift_se", shift, 0.1, shift / 10),
        MetricValue("kriging_mean_sd", krig, 0.05, 0.0),
        MetricValue("microergodic_shift_se", shift / 2),
        MetricValue("mloe", loglik / 100),
        MetricValue("mmom", -loglik / 300))
    seed_status = {"loglik_error": "safe", "param_shift_se": "safe",
                   "kriging_mean_sd": "safe"}
    if failing:
        seed_status[failing] = "unsafe" if status == "unsafe" else "unresolved"
    return ToleranceResult(
        tol=tol, safe=status == "safe", reference="dense", metrics=metrics,
        seconds=seconds, speedup=speedup, nbytes=1000, error=error, status=status,
        reasons=(f"{status} at {tol:g}",), seeds=({"index": 0, "status": seed_status},),
        spread={"loglik_error": {"min": loglik / 2, "median": loglik, "max": loglik,
                                 "seeds": 3}} if not error else {})


def example_result(*, recommended: bool = True, slow: bool = False) -> CheckResult:
    factor = 0.3 if slow else 1.0
    rows = (
        _row(1e-2, status="unsafe", loglik=2.6, shift=0.06, krig=0.017, seconds=0.07,
             speedup=11.0 * factor, failing="loglik_error"),
        _row(1e-3, status="unsafe", loglik=float("nan"), shift=float("nan"),
             krig=float("nan"), seconds=float("nan"), speedup=float("nan"),
             error=BREAKDOWN),
        _row(1e-4, status="unresolved", loglik=0.02, shift=0.09, krig=0.005, seconds=0.15,
             speedup=5.3 * factor, failing="param_shift_se"),
        _row(1e-6, status="safe", loglik=1e-5, shift=2e-5, krig=3e-5, seconds=0.25,
             speedup=3.2 * factor),
        _row(1e-8, status="safe", loglik=1e-9, shift=2e-9, krig=3e-9, seconds=0.4,
             speedup=2.0 * factor),
    )
    if not recommended:
        rows = tuple(r for r in rows if r.status != "safe")
    return CheckResult(
        source="<b>wells</b>.csv", n=400, n_fit=400, n_holdout=40, d=2,
        coord_system="planar", kernel="matern32", mean="constant",
        params={"variance": 0.8, "lengthscale": 1.9, "nugget": 0.1},
        se={"natural": {"variance": 0.26, "lengthscale": 0.32, "nugget": 0.01},
            "microergodic": 0.11, "microergodic_se": 0.03},
        loglik=-236.98, reference="dense", fit={"method": "L-BFGS-B", "engine": "dense"},
        tolerances=rows, recommended_tolerance=1e-6 if recommended else None,
        speedup=3.2 * factor if recommended else None, speedup_over="dense", refit=None,
        thresholds={"loglik_nats": 0.1}, holdout={"points": 40, "rmse": 0.3,
                                                  "mean_z2": 0.9, "coverage95": 0.95},
        notes=("reference: dense Cholesky, scaled residual 0.001 (DPOT01); passes below 30",
               "Fisher information estimated by Hutch++", "Fisher information estimated by "
               "Hutch++"),
        solver={"name": "hodlr", "version": "0.1.0", "origin": "builtin"},
        solver_seeds=(0, 1, 2), warnings=("the fit stopped at the iteration limit",),
        recommendation={"reason": "loosest safe tolerance with every tighter one safe"},
        fit_converged=True)


def example_points(n: int = 400, seed: int = 0) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    return rng.uniform(0, 10, (n, 2)), np.arange(0, n, 10)
