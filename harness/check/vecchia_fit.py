"""The maximum-likelihood fit at scale: a Vecchia pilot, then a refinement toward the
exact MLE with the exact score.

1. Start: L-BFGS-B on the dense likelihood of a random subset of ``pilot_n`` points
   (``fitting.fit_mle``; cheap at any n), from the check's starts.
2. Vecchia pilot: Fisher scoring on the Vecchia log-likelihood of all n points with its
   exact gradient and Fisher information (Guinness 2021, Stat. Comput. 31, secs. 2-3),
   the ordering, pattern and supernodes built once and reused at every theta
   (``fit_engines.VecchiaEngine``), until the Newton decrement g' F^-1 g / 2 is below
   ``DECREMENT_TOL_NAT`` (Boyd and Vandenberghe 2004, sec. 9.5.1;
   ``fisher_steps``). Deterministic: no probe, no seed.
3. Exact refinement: where the dense log-likelihood with its score fits the memory
   budget (no dense Fisher information is needed), at most ``REFINE_MAX_STEPS`` steps
   s = B^-1 g with the exact dense score g and a metric B that starts as the Vecchia
   Fisher information F~ at the pilot and takes, after each step, the BFGS update with
   the step and the change of the exact score (Nocedal and Wright 2006, eq. 6.19:
   B+ = B - B s s' B / s' B s + v v' / v' s with v = g_old - g_new, skipped unless
   v' s > 0), so the metric learns the exact curvature along the steps taken. A
   quasi-Newton step; the score is exact, so the step is deterministic; bounds as in
   ``fisher_steps.free_step``. It stops when the estimated distance to the exact MLE,
   sqrt(s' B s) in SE units (a bound on every parameter's |s_i| / SE_i), is at most
   ``REFINE_TOL_SE``. Beyond the budget the refinement is not done (an
   exact-operator score per step would cost a whole reference stage each) and the
   record says so: the estimate is then the Vecchia MLE, and the check measures its
   distance to the exact MLE from its reference's exact score at the estimate
   (``harness.check.exact_distance``).

Why ``FIT_NEIGHBOURS`` = 40: the Vecchia pass costs O(n m^2) with m nonzeros per column
of the inverse Cholesky factor; a fixed count of nearest earlier points keeps m bounded
whatever n (about 96 per column for 2D uniform points with the default supernodes,
``harness.solvers.vecchia.factorization.NEIGHBOURS_KNOB``). The exact steps converge at
the rate at which the metric misses the exact curvature, so the Vecchia Fisher
information must be close to the exact one. On 2D uniform points (Matern 3/2, l = 0.1,
nugget 1e-2, n = 4,096) 40 nearest points give a KL divergence of 0.18 nat from the exact
model, against 12 nat for the radius rule at rho = 9 with 168 nonzeros per column, the
setting with which two exact steps on the demo (8,000 points, 4 parameters) ended 0.015
SE from the exact MLE (0.044 SE from rho = 6).
"""

from __future__ import annotations

import math
import time
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from harness.check.fisher_steps import (
    DECREMENT_TOL_NAT,
    fisher_scoring,
    free_step,
    step_in_se,
    step_norm_se,
)
from harness.check.fit_engines import DenseEngine, Engine, EngineEvaluation, VecchiaEngine
from harness.check.fit_records import FitStage, MleFit, bounds_hit
from harness.check.fitting import fit_mle
from harness.model.kernels import Kernel

#: Nearest earlier points each point conditions on in the fit's Vecchia likelihood
#: (module docstring).
FIT_NEIGHBOURS = 40
#: Stop the exact refinement when sqrt(s' F s) <= this, in SE units.
REFINE_TOL_SE = 0.02
#: At most this many exact-score steps (each one dense evaluation with its score;
#: ``fit_time_budget`` still caps them). Two steps ended 0.054 SE from the exact MLE on the
#: fields package's North American rainfall data (1,720 points, Matern 3/2, the at-scale
#: plan forced at ``dense_fit_max_n`` = 1,000; ``tests/test_open_data.py``).
REFINE_MAX_STEPS = 6
#: Backtracking of an exact step: t = 1, 1/2, 1/4.
_SMALLEST_STEP = 0.25


@dataclass(frozen=True)
class Refinement:
    """The exact refinement's end point (``refine_exact``).

    ``distance_se`` is sqrt(s' F s) of the next step at the end, ``step_se`` its largest
    per-parameter |s_i| / SE_i; ``start_loglik`` the exact log-likelihood at the start.
    """

    theta: np.ndarray
    loglik: float
    start_loglik: float
    score: np.ndarray
    fisher: np.ndarray
    steps: int
    evaluations: int
    converged: bool
    distance_se: float
    step_se: float
    note: str


def vecchia_fisher(points: np.ndarray, y: np.ndarray, kernel: Kernel, *, mean: str,
                   neighbours: int = FIT_NEIGHBOURS) -> np.ndarray:
    """The Vecchia Fisher information at ``kernel``'s parameters, the at-scale fit's
    metric (Guinness 2021, Stat. Comput. 31, secs. 2-3): deterministic, O(n m^2) for m
    nearest earlier points; the check's SE unit at fixed parameters beyond the dense
    fit's limit."""
    engine = VecchiaEngine(points, y, kernel, mean=mean, neighbours=neighbours)
    return np.asarray(engine(kernel.theta, fisher=True).fisher)


def bfgs_update(metric: np.ndarray, step: np.ndarray, change: np.ndarray) -> np.ndarray:
    """B+ = B - B s s' B / (s' B s) + v v' / (v' s) (Nocedal and Wright 2006, eq. 6.19),
    with v the decrease of the score along the step; B itself when v' s <= 0 (no
    positive curvature seen: the update would lose positive definiteness)."""
    curvature = float(change @ step)
    bs = metric @ step
    sbs = float(step @ bs)
    if curvature <= 0.0 or sbs <= 0.0:
        return metric
    return metric - np.outer(bs, bs) / sbs + np.outer(change, change) / curvature


def refine_exact(exact: Engine, metric: Engine, theta0: np.ndarray, *,
                 bounds: Sequence[tuple[float, float]], max_steps: int = REFINE_MAX_STEPS,
                 tol_se: float = REFINE_TOL_SE, deadline: float | None = None
                 ) -> Refinement:
    """At most ``max_steps`` steps s = B^-1 g from theta0 with the exact score g of
    ``exact`` and the metric B: the Fisher information F~ of ``metric`` at theta0, BFGS
    updated after every step (module docstring, 3). The returned ``fisher`` is F~ at
    the end point (the SE unit of the audit).

    A step is accepted at the first t in 1, 1/2, 1/4 whose exact log-likelihood is not
    below the current one by more than 1e-8 nat (backtracking, Nocedal and Wright 2006,
    Algorithm 3.1). ``deadline`` is a ``time.monotonic()`` value.
    """
    lo = np.array([b[0] for b in bounds])
    hi = np.array([b[1] for b in bounds])
    theta = np.clip(np.asarray(theta0, dtype=float), lo, hi)
    current: EngineEvaluation = exact(theta)
    start_loglik = current.loglik
    start_fisher = np.asarray(metric(theta, fisher=True).fisher)
    curvature = start_fisher
    evaluations, steps, note = 1, 0, ""
    while True:
        step, free = free_step(theta, np.asarray(current.score), curvature, lo, hi)
        distance = step_norm_se(step, curvature, free)
        if distance <= tol_se:
            break
        if steps >= max_steps:
            note = (f"the exact refinement stopped after {steps} step(s) at an estimated "
                    f"distance of {distance:.3g} SE to the exact MLE, above {tol_se:g} SE")
            break
        if deadline is not None and time.monotonic() > deadline:
            note = (f"the exact refinement stopped at the fit's time budget after "
                    f"{steps} step(s), {distance:.3g} SE from the exact MLE")
            break
        t, accepted = 1.0, False
        while t >= _SMALLEST_STEP:
            trial_theta = np.clip(theta + t * step, lo, hi)
            evaluations += 1
            try:
                trial = exact(trial_theta)
            except (np.linalg.LinAlgError, FloatingPointError, ValueError):
                t /= 2
                continue
            if math.isfinite(trial.loglik) and trial.loglik >= current.loglik - 1e-8:
                moved, previous_score = trial_theta - theta, np.asarray(current.score)
                theta, current, accepted = trial_theta, trial, True
                break
            t /= 2
        if not accepted:
            note = (f"the exact refinement stopped: no step length in 1 .. "
                    f"{_SMALLEST_STEP:g} increased the exact log-likelihood ({steps} "
                    f"step(s), {distance:.3g} SE from the exact MLE)")
            break
        steps += 1
        curvature = bfgs_update(curvature, moved,
                                previous_score - np.asarray(current.score))
    converged = distance <= tol_se
    if converged:
        note = (f"converged: {distance:.2g} SE <= {tol_se:g} SE from the exact MLE after "
                f"{steps} exact step(s)")
    end_fisher = np.asarray(metric(theta, fisher=True).fisher) if steps else start_fisher
    return Refinement(theta=theta, loglik=current.loglik, start_loglik=start_loglik,
                      score=np.asarray(current.score), fisher=end_fisher, steps=steps,
                      evaluations=evaluations, converged=converged, distance_se=distance,
                      step_se=step_in_se(step, curvature, free), note=note)


def fit_at_scale(points: np.ndarray, y: np.ndarray, template: Kernel, *, mean: str,
                 starts: Sequence[np.ndarray], bounds: Sequence[tuple[float, float]],
                 pilot_index: np.ndarray, exact_score: bool,
                 memory_budget: int | None = None, time_budget: float = math.inf,
                 max_iter: int = 200, max_steps: int = 20, neighbours: int = FIT_NEIGHBOURS,
                 decrement_tol: float = DECREMENT_TOL_NAT,
                 refine_tol_se: float = REFINE_TOL_SE) -> MleFit:
    """The at-scale MLE of all points (module docstring).

    Parameters
    ----------
    points, y : the data (all n points).
    template : Kernel
        Family, shape parameters, isotropy and nugget status.
    mean : str
        ``zero``, ``constant`` or ``linear`` (GLS profile).
    starts, bounds : log-scale starting points and (low, high) per parameter.
    pilot_index : ndarray of int
        The random subset of the start (step 1).
    exact_score : bool
        Whether the dense log-likelihood with its score fits the memory budget (the
        plan's ``exact_score_fits``): the exact refinement runs only then.
    memory_budget : int or None
        Bytes for the dense evaluations.
    time_budget : float
        Seconds the whole fit may take; past it each stage stops and reports itself
        unconverged.
    max_iter, max_steps : L-BFGS-B iterations of the start, Fisher-scoring steps of the
        pilot.
    neighbours : int
        The Vecchia likelihood's nearest earlier points per point (``FIT_NEIGHBOURS``).
    decrement_tol : float
        The pilot's Newton-decrement threshold in nats.
    refine_tol_se : float
        The refinement's stopping distance to the exact MLE in SE units.
    """
    t0 = time.perf_counter()
    deadline = time.monotonic() + time_budget if math.isfinite(time_budget) else None
    bounds = tuple((float(lo), float(hi)) for lo, hi in bounds)
    start = fit_mle(DenseEngine(points[pilot_index], y[pilot_index], template, mean=mean),
                    template, starts=starts, bounds=bounds, max_iter=max_iter,
                    deadline=deadline)
    vecchia = VecchiaEngine(points, y, template, mean=mean, neighbours=neighbours)
    pilot = fisher_scoring(vecchia, template, start.theta, bounds=bounds,
                           max_steps=max_steps, decrement_tol=decrement_tol,
                           deadline=deadline)
    pilot_note = (f"Fisher scoring on the Vecchia likelihood (neighbours = {neighbours}, "
                  f"{vecchia.nnz_per_column:.0f} nonzeros per column) from a dense "
                  f"L-BFGS-B start on {pilot_index.size:,} random points: "
                  + pilot.starts[0].message)
    notes = [*start.notes, *pilot.notes]
    evaluations = start.evaluations + pilot.evaluations
    refined: Refinement | None = None
    if not exact_score:
        refinement = ("not done: the dense log-likelihood with its score at n = "
                      f"{y.size:,} is over the memory budget, and a refinement against "
                      "the exact operator is not implemented; the estimate is the "
                      f"Vecchia MLE at neighbours = {neighbours}, its distance to the "
                      "exact MLE measured at the reference when the reference gives an "
                      "exact score")
    elif deadline is not None and time.monotonic() > deadline:
        refinement = ("not done: the fit's time budget was spent by the Vecchia pilot; "
                      "the estimate is the Vecchia MLE")
    else:
        exact = DenseEngine(points, y, template, mean=mean, memory_budget=memory_budget)
        refine_start = time.perf_counter()
        refined = refine_exact(exact, vecchia, pilot.theta, bounds=bounds,
                               tol_se=refine_tol_se, deadline=deadline)
        refinement = refined.note
        evaluations += refined.evaluations
    stages = [FitStage(name="vecchia pilot", params=pilot.kernel.natural_params(),
                       theta=pilot.theta, loglik=pilot.loglik,
                       exact_loglik=math.nan if refined is None else refined.start_loglik,
                       steps=pilot.accepted_steps, converged=pilot.converged,
                       statistic=pilot.decrement, tolerance=decrement_tol, note=pilot_note,
                       seconds=start.seconds + pilot.seconds)]
    if refined is None:
        notes.append("exact refinement " + refinement)
        return MleFit(kernel=pilot.kernel, theta=pilot.theta, loglik=pilot.loglik,
                      score=pilot.score, engine="vecchia",
                      method=f"Fisher scoring (Vecchia, neighbours = {neighbours})",
                      starts=(*start.starts, *pilot.starts), bounds=bounds,
                      bounds_hit=pilot.bounds_hit, evaluations=evaluations,
                      seconds=time.perf_counter() - t0, notes=tuple(notes),
                      fisher=pilot.fisher, converged=pilot.converged,
                      step_se=pilot.step_se, score_tol_se=pilot.score_tol_se,
                      accepted_steps=pilot.accepted_steps, decrement=pilot.decrement,
                      stages=tuple(stages), refinement=refinement)
    kernel = template.with_theta(refined.theta)
    stages.append(FitStage(name="exact refinement", params=kernel.natural_params(),
                           theta=refined.theta, loglik=refined.loglik,
                           exact_loglik=refined.loglik, steps=refined.steps,
                           converged=refined.converged, statistic=refined.distance_se,
                           tolerance=refine_tol_se, note=refined.note,
                           seconds=time.perf_counter() - refine_start))
    if not refined.converged:
        notes.append(refined.note + ": not converged")
    return MleFit(kernel=kernel, theta=refined.theta, loglik=refined.loglik,
                  score=refined.score, engine="vecchia",
                  method=(f"Fisher scoring (Vecchia, neighbours = {neighbours}) + "
                          "exact-score refinement"),
                  starts=(*start.starts, *pilot.starts), bounds=bounds,
                  bounds_hit=bounds_hit(refined.theta, bounds, template.param_names),
                  evaluations=evaluations, seconds=time.perf_counter() - t0,
                  notes=tuple(notes), fisher=refined.fisher, converged=refined.converged,
                  step_se=refined.step_se, score_tol_se=refine_tol_se,
                  accepted_steps=pilot.accepted_steps + refined.steps,
                  decrement=pilot.decrement, stages=tuple(stages), refinement=refinement)
