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
   with the exact dense score g by defect correction with the Vecchia likelihood L~ as
   the surrogate: at theta_k the offset c_k = g(theta_k) - g~(theta_k) is fixed and
   L~(theta) + c_k'(theta - theta_k) is maximized by Fisher scoring (cheap Vecchia
   evaluations only); the maximizer is the next theta. Its fixed points are the roots
   of the exact score, and it converges at the rate at which the surrogate's curvature
   differs from the exact one (a Newton-type step with the Vecchia likelihood's own
   curvature, Fisher scoring of it included, as the model; the score is exact, so the
   step is deterministic; bounds as in ``fisher_steps.free_step``). It stops when the
   estimated distance to the exact MLE, sqrt(s' F~ s) in SE units of the step s to the
   next target (a bound on every parameter's |s_i| / SE_i), is at most
   ``REFINE_TOL_SE``. Beyond the budget the refinement is not done (an
   exact-operator score is not implemented here) and the record says so: the estimate
   is then the Vecchia MLE.

Why ``FIT_RHO`` = 6: the Vecchia pass costs O(n m^2) with m nonzeros per column of the
inverse Cholesky factor, and m grows like rho^d (``harness.solvers.vecchia.sparsity``),
so a fixed rho keeps m bounded whatever n: about 90-100 for 2D uniform points at rho =
6 with the default supernodes (``harness.solvers.vecchia.factorization.RHO_KNOB``'s
sweep), 39 on the demo's transects, a fraction of a second per evaluation at 8,000
points. A tighter rho brings the Vecchia MLE nearer the exact one only slowly (on the
demo the pilot is about 0.5 nat below the exact maximum), and the exact steps close
that gap anyway; a looser one would make each of the pilot's evaluations dearer.
"""

from __future__ import annotations

import math
import time
from collections.abc import Sequence
from dataclasses import dataclass, replace

import numpy as np

from harness.check.fisher_steps import DECREMENT_TOL_NAT, fisher_scoring
from harness.check.fit_engines import DenseEngine, Engine, EngineEvaluation, VecchiaEngine
from harness.check.fit_records import FitStage, MleFit, bounds_hit
from harness.check.fitting import fit_mle
from harness.model.kernels import Kernel

#: Conditioning radius of the fit's Vecchia likelihood, in maximin length scales
#: (module docstring).
FIT_RHO = 6.0
#: Stop the exact refinement when sqrt(s' F s) <= this, in SE units.
REFINE_TOL_SE = 0.02
#: At most this many exact-score steps.
REFINE_MAX_STEPS = 2
#: Backtracking of an exact step: t = 1, 1/2, 1/4.
_SMALLEST_STEP = 0.25
#: Newton decrement (nats) of the inner fits on the offset surrogate: lambda = 1.4e-3
#: SE, well inside ``REFINE_TOL_SE`` (``fisher_steps`` module docstring).
_INNER_DECREMENT_NAT = 1e-6


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


class OffsetEngine:
    """The surrogate's log-likelihood plus the linear term c'(theta - theta_ref): score
    g~(theta) + c, the same Fisher information (the defect correction of ``refine_exact``).
    """

    def __init__(self, surrogate: Engine, offset: np.ndarray, theta_ref: np.ndarray) -> None:
        self.surrogate, self.offset, self.theta_ref = surrogate, offset, theta_ref
        self.name = f"{getattr(surrogate, 'name', 'surrogate')} + exact-score offset"

    def __call__(self, theta: np.ndarray, *, fisher: bool = False) -> EngineEvaluation:
        ev = self.surrogate(theta, fisher=fisher)
        shift = float(self.offset @ (np.asarray(theta) - self.theta_ref))
        return replace(ev, loglik=ev.loglik + shift, score=np.asarray(ev.score) + self.offset)


def refine_exact(exact: Engine, surrogate: Engine, template: Kernel, theta0: np.ndarray, *,
                 bounds: Sequence[tuple[float, float]], max_steps: int = REFINE_MAX_STEPS,
                 tol_se: float = REFINE_TOL_SE, deadline: float | None = None
                 ) -> Refinement:
    """At most ``max_steps`` exact steps from theta0 by defect correction (module
    docstring, 3).

    At theta_k: the exact score g(theta_k) and the surrogate's g~(theta_k) give the
    offset c_k = g(theta_k) - g~(theta_k); Fisher scoring on the surrogate plus
    c_k'(theta - theta_k) (cheap evaluations only, to a Newton decrement of
    ``_INNER_DECREMENT_NAT``) gives the target theta_k+1, whose fixed point is a root of
    the exact score. The estimated distance to the exact MLE is sqrt(s' F~ s) of the
    step s = theta_k+1 - theta_k in the surrogate's Fisher information F~ at theta_k.
    A step is accepted at the first t in 1, 1/2, 1/4 whose exact log-likelihood is not
    below the current one by more than 1e-8 nat (backtracking, Nocedal and Wright 2006,
    Algorithm 3.1). ``deadline`` is a ``time.monotonic()`` value. The returned
    ``fisher`` is F~ at the end point (the SE unit of the audit).
    """
    lo = np.array([b[0] for b in bounds])
    hi = np.array([b[1] for b in bounds])
    theta = np.clip(np.asarray(theta0, dtype=float), lo, hi)
    current: EngineEvaluation = exact(theta)
    start_loglik = current.loglik
    evaluations, steps, note = 1, 0, ""
    while True:
        local = surrogate(theta, fisher=True)
        fisher = np.asarray(local.fisher)
        offset = np.asarray(current.score) - np.asarray(local.score)
        target = fisher_scoring(OffsetEngine(surrogate, offset, theta), template, theta,
                                bounds=bounds, decrement_tol=_INNER_DECREMENT_NAT)
        step = target.theta - theta
        distance = float(math.sqrt(max(float(step @ fisher @ step), 0.0)))
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
                theta, current, accepted = trial_theta, trial, True
                break
            t /= 2
        if not accepted:
            note = (f"the exact refinement stopped: no step length in 1 .. "
                    f"{_SMALLEST_STEP:g} increased the exact log-likelihood ({steps} "
                    f"step(s), {distance:.3g} SE from the exact MLE)")
            break
        steps += 1
    converged = distance <= tol_se
    if converged:
        note = (f"converged: {distance:.2g} SE <= {tol_se:g} SE from the exact MLE after "
                f"{steps} exact step(s)")
    se = np.sqrt(np.diag(np.linalg.inv(fisher)))
    return Refinement(theta=theta, loglik=current.loglik, start_loglik=start_loglik,
                      score=np.asarray(current.score), fisher=fisher, steps=steps,
                      evaluations=evaluations, converged=converged, distance_se=distance,
                      step_se=float(np.max(np.abs(step) / se)), note=note)


def fit_at_scale(points: np.ndarray, y: np.ndarray, template: Kernel, *, mean: str,
                 starts: Sequence[np.ndarray], bounds: Sequence[tuple[float, float]],
                 pilot_index: np.ndarray, exact_score: bool,
                 memory_budget: int | None = None, time_budget: float = math.inf,
                 max_iter: int = 200, max_steps: int = 20, rho: float = FIT_RHO,
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
    rho : float
        The Vecchia likelihood's conditioning radius (``FIT_RHO``).
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
    vecchia = VecchiaEngine(points, y, template, mean=mean, rho=rho)
    pilot = fisher_scoring(vecchia, template, start.theta, bounds=bounds,
                           max_steps=max_steps, decrement_tol=decrement_tol,
                           deadline=deadline)
    pilot_note = (f"Fisher scoring on the Vecchia likelihood (rho = {rho:g}, "
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
                      f"Vecchia MLE at rho = {rho:g}, its distance to the exact MLE not "
                      "measured")
    elif deadline is not None and time.monotonic() > deadline:
        refinement = ("not done: the fit's time budget was spent by the Vecchia pilot; "
                      "the estimate is the Vecchia MLE")
    else:
        exact = DenseEngine(points, y, template, mean=mean, memory_budget=memory_budget)
        refine_start = time.perf_counter()
        refined = refine_exact(exact, vecchia, template, pilot.theta, bounds=bounds,
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
                      method=f"Fisher scoring (Vecchia, rho = {rho:g})",
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
                  method=f"Fisher scoring (Vecchia, rho = {rho:g}) + exact-score refinement",
                  starts=(*start.starts, *pilot.starts), bounds=bounds,
                  bounds_hit=bounds_hit(refined.theta, bounds, template.param_names),
                  evaluations=evaluations, seconds=time.perf_counter() - t0,
                  notes=tuple(notes), fisher=refined.fisher, converged=refined.converged,
                  step_se=refined.step_se, score_tol_se=refine_tol_se,
                  accepted_steps=pilot.accepted_steps + refined.steps,
                  decrement=pilot.decrement, stages=tuple(stages), refinement=refinement)
