"""Stage 1-2 of a check: the parameters it audits at and the Fisher information there.

The maximum-likelihood fit follows the plan of ``harness.check.fit_plan`` (n and the
memory budget decide, never a timing): the dense exact fit (screened starts, L-BFGS-B,
Fisher scoring polish, ``harness.check.fitting``) up to ``dense_fit_max_n`` within the
budget; beyond it the at-scale fit (``harness.check.vecchia_fit``): Fisher scoring on the
deterministic Vecchia likelihood to a Newton-decrement threshold, then at most
``vecchia_fit.REFINE_MAX_STEPS`` steps with the exact score toward the exact MLE where the
dense score fits the budget. On a line with a half-integer Matern kernel the at-scale fit is
exact instead: L-BFGS-B and a Newton polish on the Kalman filter's O(n) likelihood
(``harness.check.line_fit``). A kernel without a compiled Vecchia form falls back to
Fisher scoring with the compressed solver's stochastic score. ``fit_time_budget`` caps
the fit stage. Or the parameters are given (``fixed_params``).
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import numpy as np

from harness.audit.audit_references import DENSE_CRASH_ADVICE
from harness.audit.solver_seeds import solver_seed
from harness.check.check_options import CheckError, CheckOptions
from harness.check.fisher_steps import fisher_scoring
from harness.check.fit_engines import CompressedEngine, DenseEngine
from harness.check.fit_plan import (
    DENSE_FIT_MAX_N,
    line_applies,
    plan_fit,
    plan_fixed_fisher,
)
from harness.check.fit_records import MleFit
from harness.check.fitting import (
    DENSE_SCORE_TOL_SE,
    DataScale,
    data_scale,
    default_bounds,
    default_starts,
    fit_dense,
    fit_mle,
)
from harness.check.line_fit import fit_on_line
from harness.check.vecchia_fit import FIT_NEIGHBOURS, REFINE_TOL_SE, fit_at_scale, vecchia_fisher
from harness.infra.child_process import run_stage
from harness.linalg.dense_budget import check_dense_budget
from harness.model.kernels import Kernel, make_kernel
from harness.references import DenseBudgetError, dense_evaluate

#: Score tolerance (SE units) of the compressed fall-back fit.
COMPRESSED_SCORE_TOL_SE = 1e-2
#: What to try when the fit on the line dies in native code.
LINE_FIT_CRASH_ADVICE = "--fixed-params NAME=VALUE ... (no fit)"
Progress = Callable[[str], None]


def model_template(options: CheckOptions, d: int) -> Kernel:
    params: dict[str, Any] = dict(options.shape)
    params["lengthscale"] = [1.0] * d if options.anisotropic else 1.0
    params["nugget"] = 1.0 if options.nugget else 0.0
    return make_kernel(options.kernel, params)


def dense_fits(n: int, budget: int | None, *, fisher: bool = False, n_params: int = 0
                ) -> bool:
    try:
        check_dense_budget(n, budget=budget, score=True, fisher=fisher, n_params=n_params)
    except DenseBudgetError:
        return False
    return True


@dataclass(frozen=True)
class FitOutcome:
    """The estimate a check audits at: the fit (None for fixed parameters), the kernel at
    the estimate, the Fisher information (the unit of the shift metrics), the fit's
    record, notes and whether it converged (a fixed-parameter check counts as
    converged)."""

    fit: MleFit | None
    kernel: Kernel
    fisher: np.ndarray
    info: dict[str, Any]
    notes: list[str]
    converged: bool


def start_from_params(template: Kernel, scale: DataScale, options: CheckOptions
                       ) -> np.ndarray:
    """The starting theta ``--param`` asks for: the given values, the others from the
    data's spread as in ``default_starts`` (0.8 of the variance, 0.2 of the diameter,
    0.2 of the variance as nugget)."""
    params: dict[str, Any] = {"variance": 0.8 * scale.variance,
                              "lengthscale": [0.2 * scale.diameter] * len(template.lengthscale)}
    if template.has_nugget:
        params["nugget"] = 0.2 * scale.variance
    given = dict(options.start_params or {})
    params |= dict(options.shape) | given
    theta = make_kernel(options.kernel, params).theta
    if theta.shape != template.theta.shape:
        raise CheckError(f"--param {given}: gives {theta.size} "
                         f"parameters, the model has {template.theta.size} "
                         f"({', '.join(template.param_names)})")
    return theta


def fit_parameters(x: np.ndarray, y: np.ndarray, template: Kernel, options: CheckOptions,
         rng: np.random.Generator, say: Progress) -> FitOutcome:
    """The MLE of all points and the Fisher information at it (module docstring 1-2)."""
    notes: list[str] = []
    scale = data_scale(x, y, mean=options.mean)
    bounds = default_bounds(template, scale)
    starts = default_starts(template, scale)
    if options.start_params:
        starts.append(start_from_params(template, scale, options))
    n = y.size
    dense_max_n = (DENSE_FIT_MAX_N if options.dense_fit_max_n is None
                   else options.dense_fit_max_n)
    plan = plan_fit(n, template.n_params, family=template.family,
                    memory_budget=options.memory_budget,
                    time_budget=options.fit_time_budget, dense_max_n=dense_max_n,
                    on_line=line_applies(x.shape[1], template))
    notes.append(f"fit plan: {plan.engine} ({plan.reason})")
    if plan.engine == "dense":
        tol_se = options.score_tol_se or DENSE_SCORE_TOL_SE
        say(f"fitting by dense L-BFGS-B + Fisher scoring at n = {n:,}")
        # in a child process: a native crash in the BLAS is a one-line error, not a death
        fit = run_stage(fit_dense, x, y, template, mean=options.mean, starts=starts,
                        bounds=bounds, memory_budget=options.memory_budget,
                        max_iter=options.fit_max_iter, max_steps=options.fit_max_steps,
                        score_tol_se=tol_se, time_budget=options.fit_time_budget,
                        stage="the dense fit", n=n, advice=DENSE_CRASH_ADVICE)
    elif plan.engine == "statespace":
        tol_se = options.score_tol_se or DENSE_SCORE_TOL_SE
        say(f"fitting by L-BFGS-B + Newton on the exact Kalman-filter likelihood at "
            f"n = {n:,}")
        fit = run_stage(fit_on_line, x, y, template, mean=options.mean, starts=starts,
                        bounds=bounds, max_iter=options.fit_max_iter,
                        max_steps=options.fit_max_steps, score_tol_se=tol_se,
                        time_budget=options.fit_time_budget, stage="the fit on the line",
                        n=n, advice=LINE_FIT_CRASH_ADVICE)
        notes.append("Fisher information (SE units of the shift metrics): the observed "
                     "information at the exact MLE, by central differences of the exact "
                     "Kalman-filter score")
    elif plan.engine == "vecchia":
        pilot = np.sort(rng.choice(n, size=min(options.pilot_n, n), replace=False))
        say(f"fitting by Fisher scoring on the Vecchia likelihood at n = {n:,}"
            + (" and exact-score refinement" if plan.exact_score_fits else ""))
        fit = run_stage(fit_at_scale, x, y, template, mean=options.mean, starts=starts,
                        bounds=bounds, pilot_index=pilot,
                        exact_score=plan.exact_score_fits,
                        memory_budget=options.memory_budget,
                        time_budget=options.fit_time_budget,
                        max_iter=options.fit_max_iter, max_steps=options.fit_max_steps,
                        refine_tol_se=options.score_tol_se or REFINE_TOL_SE,
                        stage="the at-scale fit", n=n, advice=DENSE_CRASH_ADVICE)
        notes.append(f"fit: {fit.method}; pilot: {fit.stages[0].note}; exact refinement: "
                     f"{fit.refinement}")
        notes.append("Fisher information (SE units of the shift metrics) from the Vecchia "
                     f"approximation with {FIT_NEIGHBOURS} neighbours, not exact")
    else:
        tol_se = options.score_tol_se or COMPRESSED_SCORE_TOL_SE
        tightest = min(options.tolerances)
        pilot = np.sort(rng.choice(n, size=min(options.pilot_n, n), replace=False))
        say(f"pilot fit by dense L-BFGS-B on {pilot.size:,} random points")
        pilot_fit = fit_mle(DenseEngine(x[pilot], y[pilot], template, mean=options.mean),
                            template, starts=starts, bounds=bounds,
                            max_iter=options.fit_max_iter)
        say(f"Fisher scoring at n = {n:,} with hodlr tol {tightest:g}")
        engine = CompressedEngine(x, y, template, mean=options.mean, tol=tightest,
                                  seed=solver_seed(options.seed, 0),
                                  leaf_size=options.leaf_size)
        fit = fisher_scoring(engine, template, pilot_fit.theta, bounds=bounds,
                             max_steps=options.fit_max_steps, step_tol_se=tol_se)
        notes.append(f"fit: dense pilot on {pilot.size:,} random points (loglik "
                     f"{pilot_fit.loglik:.6g}), then Fisher scoring at all n = {n:,} with "
                     f"the compressed solver at tol {tightest:g} (Hutch++ traces, 32 "
                     f"probes) to {tol_se:g} SE")
        notes.append("Fisher information (SE units of the shift metrics) estimated by "
                     f"Hutch++ at tol {tightest:g}, not exact")
    fisher = np.asarray(fit.fisher)
    info = fit.to_dict() | {"plan": plan.to_dict()}
    if fit.bounds_hit:
        notes.append("bounds hit: " + "; ".join(fit.bounds_hit))
    return FitOutcome(fit, fit.kernel, fisher, info, notes, fit.converged)


def fixed_parameters(x: np.ndarray, y: np.ndarray, options: CheckOptions, d: int) -> FitOutcome:
    """The given parameters and the Fisher information at them, by the engine the fit
    would use at this n and budget (``fit_plan.plan_fixed_fisher``): dense, Vecchia
    (deterministic) or Hutch++ at the tightest tolerance."""
    params = dict(options.fixed_params or {})
    kernel = make_kernel(options.kernel, dict(options.shape) | params)
    kernel.check_dimension(d)
    notes: list[str] = []
    plan = plan_fixed_fisher(int(y.size), kernel.n_params, family=kernel.family,
                             memory_budget=options.memory_budget,
                             dense_max_n=(DENSE_FIT_MAX_N if options.dense_fit_max_n is None
                                          else options.dense_fit_max_n))
    if plan.engine == "dense":
        evaluation = run_stage(dense_evaluate, x, y, kernel, mean=options.mean, score=False,
                               fisher=True, certify=False, memory_budget=options.memory_budget,
                               stage="the dense Fisher information", n=int(y.size),
                               advice=DENSE_CRASH_ADVICE)
        fisher = np.asarray(evaluation.fisher)
    elif plan.engine == "vecchia":
        fisher = run_stage(vecchia_fisher, x, y, kernel, mean=options.mean,
                           stage="the Vecchia Fisher information", n=int(y.size),
                           advice=DENSE_CRASH_ADVICE)
        notes.append("Fisher information (SE units of the shift metrics) from the Vecchia "
                     f"approximation with {FIT_NEIGHBOURS} neighbours at the given "
                     f"parameters, not exact ({plan.reason})")
    else:
        fisher = np.asarray(CompressedEngine(x, y, kernel, mean=options.mean,
                                             tol=min(options.tolerances),
                                             seed=solver_seed(options.seed, 0))(
            kernel.theta, fisher=True).fisher)
        notes.append("Fisher information estimated by Hutch++ at the tightest tolerance")
    return FitOutcome(None, kernel, fisher, {"method": "fixed (--params)", "engine": None,
                                       "converged": None,
                                       "fisher_engine": plan.engine}, notes, True)
