"""Extra evidence of the ladder reference: dense audits on nested random subsamples.

|L~ - L| is measured on subsamples of growing size m and a power law in m is fitted and
extrapolated to the full n with its 95% prediction interval (information only: the
ladder is never the sole basis of "safe").
"""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping
from dataclasses import replace
from typing import Any

import numpy as np

from harness.audit.solver_seeds import seeded_options, solver_seed
from harness.check.check_options import CheckOptions, solver_options
from harness.check.check_records import MetricValue, ToleranceResult
from harness.check.fit_stage import dense_fits
from harness.likelihood.whitening import fit_mean
from harness.model import design_matrix
from harness.model.kernels import Kernel
from harness.model.power_law import extrapolate, fit_power_law
from harness.references import DenseCholesky
from harness.solvers.protocol import Factorization
from harness.solvers.registry import ResolvedSolver, SolverRuntimeError

Progress = Callable[[str], None]


def subsample_growth(x: np.ndarray, y: np.ndarray, kernel: Kernel, options: CheckOptions,
            solver: ResolvedSolver, rng: np.random.Generator, say: Progress
            ) -> dict[str, Any]:
    """Dense audits of |L~ - L| on nested random subsamples, power law fitted in n
    (extra evidence of the ladder reference, information only)."""
    n = y.size
    sizes = [m for m in options.subsample_sizes
             if m < n and dense_fits(m, options.memory_budget)]
    if len(sizes) < 3:
        return {"sizes": sizes, "note": "fewer than 3 subsample sizes fit the budget; "
                                        "no growth fit"}
    perm = rng.permutation(n)
    errors: dict[float, list[float]] = {tol: [] for tol in options.tolerances}
    opts = solver_options(options, solver.name)
    opts = seeded_options(solver.factory, opts, solver_seed(options.seed, 0))
    for m in sizes:
        idx = np.sort(perm[:m])
        say(f"subsample audit at m = {m:,}")
        chol = DenseCholesky(x[idx], kernel, memory_budget=options.memory_budget)
        design = design_matrix(x[idx], options.mean)
        ref = evaluate_loglik(chol, y[idx], design)
        for tol in options.tolerances:
            try:
                fac = solver.factorize(x[idx], kernel, kernel.theta, tol=tol, **opts)
                errors[tol].append(abs(evaluate_loglik(fac, y[idx], design) - ref))
            except (SolverRuntimeError, np.linalg.LinAlgError):
                errors[tol].append(math.inf)
    out: dict[str, Any] = {"sizes": sizes, "n_target": n, "per_tolerance": {}}
    for tol, errs in errors.items():
        e = np.asarray(errs)
        entry: dict[str, Any] = {"errors": [float(v) for v in e]}
        if np.all(np.isfinite(e)):
            # |dL| ~ a m^b over the subsample sizes, extrapolated to n with its 95%
            # prediction interval (the project's one power-law fit).
            fit = fit_power_law(sizes, np.maximum(e, 1e-14), level=0.95)
            at_n = extrapolate(fit, n)
            entry.update({"slope": fit.slope, "extrapolated": at_n.value,
                          "upper95": at_n.high, "lower95": at_n.low})
        out["per_tolerance"][repr(tol)] = entry
    return out


def evaluate_loglik(fac: Factorization, y: np.ndarray, design: np.ndarray) -> float:
    """GLS profile log-likelihood through a factorization."""
    return float(fit_mean(fac, y, design, float(fac.logdet()))[0].loglik)


def with_growth(row: ToleranceResult, entry: Mapping[str, Any] | None) -> ToleranceResult:
    """Add the extrapolated log-likelihood error (information: the ladder is never the
    sole basis of safe)."""
    if not entry or "upper95" not in entry:
        return row
    metric = MetricValue("loglik_error_extrapolated", float(entry["upper95"]),
                         note=f"upper 95% bound of |L~ - L| extrapolated to full n "
                              f"(fitted slope {entry['slope']:.2f} in log n; information)")
    return replace(row, metrics=(*row.metrics, metric))
