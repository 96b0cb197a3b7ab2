"""Fisher scoring: theta <- theta + t F^-1 g within box bounds, and its stopping rules.

The step is the projected Newton step of Bertsekas (1982, SIAM J. Control Optim. 20)
with the expected Fisher information F as the metric (Longford 1987, Biometrika 74;
Mardia and Marshall 1984, Biometrika 71, sec. 4). Two stopping statistics:

* the step in SE units, max_i |(F^-1 g)_i| / SE_i with SE_i = sqrt((F^-1)_ii);
* the Newton decrement lambda^2 / 2 = g' F^-1 g / 2 (Boyd and Vandenberghe 2004,
  sec. 9.5.1: the estimated gap f(x) - p* of the quadratic model, here in nats). Since
  lambda^2 = s' F s for the step s = F^-1 g and |s_i| / SE_i <= sqrt(s' F s) for every
  i (Cauchy-Schwarz in the F inner product), lambda^2 / 2 <= 5e-5 nat bounds every
  parameter's step by 0.01 SE.
"""

from __future__ import annotations

import logging
import math
import time
from collections.abc import Sequence

import numpy as np

from harness.check.fit_engines import Engine
from harness.check.fit_records import BOUND_HIT_LOG, MleFit, StartResult, bounds_hit
from harness.model.evaluation import fisher_standard_errors
from harness.model.kernels import Kernel

log = logging.getLogger(__name__)

#: Default threshold of the Newton decrement lambda^2 / 2 in nats: lambda = 0.01, i.e.
#: every parameter (and every linear combination) within 0.01 SE of the maximum of the
#: quadratic model (module docstring).
DECREMENT_TOL_NAT = 5e-5


def free_step(theta: np.ndarray, score: np.ndarray, fisher: np.ndarray, lo: np.ndarray,
              hi: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Fisher-scoring step F^-1 g over the free parameters, and the free mask.

    A parameter within ``BOUND_HIT_LOG`` of a bound whose full step points out of the box
    is held fixed (projected Newton step, Bertsekas 1982);
    the step of the others solves the reduced system F_ff s_f = g_f.
    """
    full = np.linalg.solve(fisher, score)
    at_lo = (theta - lo < BOUND_HIT_LOG) & (full < 0)
    at_hi = (hi - theta < BOUND_HIT_LOG) & (full > 0)
    free = ~(at_lo | at_hi)
    step = np.zeros_like(theta)
    if np.any(free):
        step[free] = np.linalg.solve(fisher[np.ix_(free, free)], score[free])
    return step, free


def step_in_se(step: np.ndarray, fisher: np.ndarray, free: np.ndarray) -> float:
    """max_i |s_i| / SE_i over the free parameters (0 when none is free)."""
    if not np.any(free):
        return 0.0
    se = fisher_standard_errors(fisher)
    return float(np.max(np.abs(step[free]) / se[free]))


def step_norm_se(step: np.ndarray, fisher: np.ndarray, free: np.ndarray) -> float:
    """sqrt(s_f' F_ff s_f): the step's length in the Fisher metric, in SE units; it
    bounds |s_i| / SE_i for every i (module docstring)."""
    if not np.any(free):
        return 0.0
    s = step[free]
    return float(math.sqrt(max(float(s @ fisher[np.ix_(free, free)] @ s), 0.0)))


def newton_decrement(step: np.ndarray, score: np.ndarray, free: np.ndarray) -> float:
    """lambda^2 / 2 = g_f' F_ff^-1 g_f / 2 = s_f' g_f / 2 in nats (Boyd and Vandenberghe
    2004, sec. 9.5.1, eq. 9.28 with the Fisher information as the Hessian)."""
    if not np.any(free):
        return 0.0
    return 0.5 * float(step[free] @ score[free])


def noise_in_se(score_se: np.ndarray | None, fisher: np.ndarray) -> float:
    """max_i SD((F^-1 g)_i) / SE_i of a stochastic score with independent component
    errors score_se (linear propagation; 0 for an exact score)."""
    if score_se is None:
        return 0.0
    f_inv = np.linalg.inv(0.5 * (fisher + fisher.T))
    sd = np.sqrt(np.diag(f_inv @ np.diag(np.asarray(score_se) ** 2) @ f_inv))
    return float(np.max(sd / np.sqrt(np.diag(f_inv))))


def fisher_scoring(engine: Engine, kernel: Kernel, theta0: np.ndarray, *,
                   bounds: Sequence[tuple[float, float]], max_steps: int = 20,
                   step_tol_se: float = 0.01, decrement_tol: float | None = None,
                   deadline: float | None = None) -> MleFit:
    """Maximize L from theta0 by Fisher scoring with a backtracking line search.

    theta <- theta + t F^-1 g (F the expected Fisher information at the current theta,
    from the engine; Longford 1987), t = 1, 1/2, .., 1/64, the first t whose L is not
    below the current one by more than 1e-8 nat (Armijo-type backtracking, Nocedal and
    Wright 2006, Algorithm 3.1, with a zero sufficient-decrease constant).

    Stopping rule: with ``decrement_tol`` (nats), converged when the Newton decrement
    lambda^2 / 2 <= ``decrement_tol`` (module docstring); without it, converged when
    max_i |(F^-1 g)_i| / SE_i <= ``step_tol_se`` over the free parameters
    (``free_step``). When the engine's score is stochastic
    (``EngineEvaluation.score_se``) the iteration also stops once the step is within 2 x
    the score's own noise in SE units (it cannot be driven below it); if that is above
    ``step_tol_se`` the fit is returned as not converged, with the noise floor stated
    (``MleFit.score_tol_se``). The search cannot stall silently: when no step length is
    accepted, ``max_steps`` is reached first, or ``deadline`` (a ``time.monotonic()``
    value) has passed, the fit is returned with ``converged = False`` and a note saying
    so (with the number of accepted steps).
    """
    t0 = time.perf_counter()
    bounds = tuple((float(lo), float(hi)) for lo, hi in bounds)
    lo = np.array([b[0] for b in bounds])
    hi = np.array([b[1] for b in bounds])
    theta = np.clip(np.asarray(theta0, dtype=float), lo, hi)
    current = engine(theta, fisher=True)
    calls = 1
    notes: list[str] = []
    accepted_steps = 0
    converged = False
    step_se = tol_se = decrement = math.nan
    for _ in range(max_steps + 1):
        fisher = np.asarray(current.fisher)
        score = np.asarray(current.score)
        step, free = free_step(theta, score, fisher, lo, hi)
        step_se = step_in_se(step, fisher, free)
        decrement = newton_decrement(step, score, free)
        tol_se = max(step_tol_se, 2.0 * noise_in_se(current.score_se, fisher))
        if decrement_tol is not None and current.score_se is None:
            if decrement <= decrement_tol:
                converged = True
                break
        elif step_se <= tol_se:
            converged = step_se <= step_tol_se
            if not converged:
                notes.append(f"Fisher scoring stopped at the noise floor of the estimated "
                             f"score: {step_se:.3g} SE is within 2 x its noise ({tol_se:.3g} "
                             f"SE) but above the requested {step_tol_se:g} SE: not "
                             "converged to the requested tolerance (more probes or the "
                             "dense fit would resolve it)")
            break
        if accepted_steps >= max_steps:
            notes.append(f"Fisher scoring stopped after {max_steps} steps with the score "
                         f"at {step_se:.3g} SE (Newton decrement {decrement:.3g} nat): "
                         "not converged")
            break
        if deadline is not None and time.monotonic() > deadline:
            notes.append(f"Fisher scoring stopped at the fit's time budget after "
                         f"{accepted_steps} step(s), score at {step_se:.3g} SE (Newton "
                         f"decrement {decrement:.3g} nat): not converged")
            break
        t = 1.0
        accepted = False
        while t >= 1.0 / 64:
            trial_theta = np.clip(theta + t * step, lo, hi)
            calls += 1
            try:
                trial = engine(trial_theta, fisher=True)
            except (np.linalg.LinAlgError, FloatingPointError, ValueError,
                    RuntimeError) as exc:
                log.debug("Fisher scoring: evaluation failed at %s: %s", trial_theta, exc)
                t /= 2
                continue
            if math.isfinite(trial.loglik) and trial.loglik >= current.loglik - 1e-8:
                theta, current, accepted = trial_theta, trial, True
                accepted_steps += 1
                break
            t /= 2
        if not accepted:
            notes.append(f"Fisher scoring stopped: no step length in 1 .. 1/64 increased the "
                         f"log-likelihood ({accepted_steps} step(s) accepted, score at "
                         f"{step_se:.3g} SE, tolerance {tol_se:.3g} SE): not converged")
            break
    if decrement_tol is not None and current.score_se is None:
        rule = f"Newton decrement {decrement:.2g} nat <= {decrement_tol:g} nat"
    else:
        rule = f"score {step_se:.2g} SE <= {tol_se:.3g} SE"
    message = "; ".join(notes) or (f"converged: {rule} after {accepted_steps} accepted "
                                   "step(s)")
    return MleFit(kernel=kernel.with_theta(theta), theta=theta, loglik=current.loglik,
                  score=np.asarray(current.score), engine=getattr(engine, "name", "custom"),
                  method="Fisher scoring",
                  starts=(StartResult(start=np.asarray(theta0, dtype=float), theta=theta,
                                      loglik=current.loglik, evaluations=calls,
                                      message=message),),
                  bounds=bounds, bounds_hit=bounds_hit(theta, bounds, kernel.param_names),
                  evaluations=calls, seconds=time.perf_counter() - t0, notes=tuple(notes),
                  fisher=current.fisher, converged=converged, step_se=step_se,
                  score_tol_se=tol_se, accepted_steps=accepted_steps, decrement=decrement)
