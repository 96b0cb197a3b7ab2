"""Maximum-likelihood fitting of the covariance parameters (the MLE driver).

The log-likelihood L(theta) (GLS mean profiled out, or REML) is maximized over the
log-scale parameters theta = (log s2, log l_1.., log tau2) by L-BFGS-B
(scipy.optimize.minimize; Byrd, Lu, Nocedal and Zhu 1995, SIAM J. Sci. Comput. 16)
with the analytic score g_i = 1/2 a' Sigma_i a - 1/2 tr(Sigma^-1 Sigma_i)
(Rasmussen and Williams 2006, eq. 5.9) from several starting points, and polished or
re-fitted by Fisher scoring, theta <- theta + F^-1 g (Longford 1987, Biometrika 74;
Mardia and Marshall 1984, Biometrika 71, section 4).

Starting points and bounds are covaudit's own heuristics, from the data's spread:

* v = sample variance of the ordinary-least-squares residual of the mean model,
  D = diagonal of the coordinates' bounding box (the domain diameter);
* starts: (s2, l, tau2) = (0.8 v, f D, 0.2 v) for f in 0.05, 0.2, 0.5, and
  (0.98 v, 0.2 D, 0.02 v) for data with little noise;
* bounds: s2 in [1e-4 v, 1e3 v], l in [1e-4 D, 1e2 D], tau2 in [1e-8 v, 10 v].

A bound within 1e-3 (log scale) of the optimum is reported as hit: the maximum is then
on the boundary and standard errors from the Fisher information are not meaningful for
that parameter.

Standard errors SE_i = sqrt((F^-1)_ii) on the log scale, SE of a natural-scale parameter
by the delta method (exp(theta_i) SE_i). For an isotropic Matern kernel the
microergodic combination c = s2 / l^(2 nu) is consistently estimable under infill
asymptotics (Zhang 2004, JASA 99, Theorem 2); log c = a' theta, a = (1, -2 nu, 0), so
SE(log c) = sqrt(a' F^-1 a) and SE(c) = c SE(log c) (delta method).
"""

from __future__ import annotations

import logging
import math
import time
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, replace

import numpy as np
from scipy import optimize

from harness.model import design_matrix
from harness.model.evaluation import fisher_standard_errors
from harness.model.kernels import Kernel, smoothness
from harness.references import dense_evaluate

log = logging.getLogger(__name__)

#: Relative distance (log scale) under which a parameter counts as on its bound.
BOUND_HIT_LOG = 1e-3


class FitError(RuntimeError):
    """No start of the optimizer produced a finite log-likelihood."""


@dataclass(frozen=True)
class EngineEvaluation:
    """Log-likelihood, score and (when asked) Fisher information at one theta."""

    loglik: float
    score: np.ndarray
    fisher: np.ndarray | None
    seconds: float
    score_se: np.ndarray | None = None   # SE of a stochastic score (None: exact)

    def to_dict(self) -> dict[str, object]:
        return {"loglik": self.loglik, "score": self.score.tolist(),
                "fisher": None if self.fisher is None else self.fisher.tolist(),
                "seconds": self.seconds}


class DenseEngine:
    """L, g (exact traces) and F by the dense certified Cholesky reference."""

    name = "dense"

    def __init__(self, points: np.ndarray, y: np.ndarray, kernel: Kernel, *, mean: str,
                 reml: bool = False, memory_budget: int | None = None) -> None:
        self.points, self.y, self.kernel = points, y, kernel
        self.mean, self.reml, self.memory_budget = mean, reml, memory_budget

    def __call__(self, theta: np.ndarray, *, fisher: bool = False) -> EngineEvaluation:
        start = time.perf_counter()
        ev = dense_evaluate(self.points, self.y, self.kernel.with_theta(theta),
                            mean=self.mean, reml=self.reml, score=True, fisher=fisher,
                            memory_budget=self.memory_budget, certify=False)
        return EngineEvaluation(loglik=ev.loglik, score=np.asarray(ev.score),
                                fisher=ev.fisher, seconds=time.perf_counter() - start)


class CompressedEngine:
    """L, g and F through a compressed solver (default: the built-in HODLR), traces by
    Hutch++.

    The solver's seed and the probes are the same at every theta (common random numbers),
    so the estimated score is a smooth function of theta for the optimizer. ``seed`` is
    the solver's seed (``harness.audit.solver_seeds.solver_seed``); the probes use
    ``seed + 1``.
    """

    name = "hodlr"

    def __init__(self, points: np.ndarray, y: np.ndarray, kernel: Kernel, *, mean: str,
                 reml: bool = False, tol: float, probes: int = 32, seed: int = 0,
                 leaf_size: int = 128, solver: object | None = None,
                 options: Mapping[str, object] | None = None) -> None:
        from harness.solvers.registry import resolve_solver

        self.points, self.y, self.kernel = points, y, kernel
        self.mean, self.reml, self.tol = mean, reml, tol
        self.probes, self.seed, self.leaf_size = probes, seed, leaf_size
        self.solver = solver if solver is not None else resolve_solver("hodlr")
        name = str(getattr(self.solver, "name", "hodlr"))
        self.name = name
        base = dict(options) if options is not None else (
            {"leaf_size": leaf_size} if name == "hodlr" else {})
        from harness.audit.solver_seeds import seeded_options

        self.options = seeded_options(self.solver.factory, base, seed)  # type: ignore[attr-defined]

    def __call__(self, theta: np.ndarray, *, fisher: bool = False) -> EngineEvaluation:
        from harness.likelihood import evaluate_likelihood

        start = time.perf_counter()
        model = self.kernel.with_theta(theta)
        fac = self.solver.factorize(self.points, self.kernel, np.asarray(theta),  # type: ignore[attr-defined]
                                    tol=self.tol, **self.options)
        ev = evaluate_likelihood(fac, self.points, self.y, model, mean=self.mean,
                                 reml=self.reml, trace="hutchpp", probes=self.probes,
                                 rng=self.seed + 1, fisher=fisher)
        # g_i = 1/2 q_i - 1/2 tr_i, so SE(g_i) = SE(tr_i) / 2.
        score_se = (None if ev.trace_stderr is None
                    else 0.5 * np.asarray(ev.trace_stderr, dtype=float))
        return EngineEvaluation(loglik=ev.loglik, score=np.asarray(ev.score),
                                fisher=ev.fisher, seconds=time.perf_counter() - start,
                                score_se=score_se)


Engine = Callable[..., EngineEvaluation]


@dataclass(frozen=True)
class DataScale:
    """Residual variance v and domain diameter D used for starts and bounds."""

    variance: float
    diameter: float

    def to_dict(self) -> dict[str, float]:
        return {"variance": self.variance, "diameter": self.diameter}


def data_scale(points: np.ndarray, y: np.ndarray, *, mean: str) -> DataScale:
    """v = var of the OLS residual of the mean model, D = bounding-box diagonal."""
    points = np.asarray(points, dtype=float)
    points = points[:, None] if points.ndim == 1 else points
    design = design_matrix(points, mean)
    resid = np.asarray(y, dtype=float)
    if design.shape[1]:
        beta, *_ = np.linalg.lstsq(design, resid, rcond=None)
        resid = resid - design @ beta
    var = float(np.mean(resid ** 2))
    diameter = float(np.linalg.norm(points.max(axis=0) - points.min(axis=0)))
    return DataScale(variance=var, diameter=diameter)


def _theta_of(kernel: Kernel, s2: float, ls: float, tau2: float) -> np.ndarray:
    values = [s2] + [ls] * len(kernel.lengthscale)
    if kernel.has_nugget:
        values.append(tau2)
    return np.log(np.asarray(values))


def default_starts(kernel: Kernel, scale: DataScale) -> list[np.ndarray]:
    """Starting thetas from the data's spread (module docstring)."""
    v, d = scale.variance, scale.diameter
    starts = [_theta_of(kernel, 0.8 * v, f * d, 0.2 * v) for f in (0.05, 0.2, 0.5)]
    starts.append(_theta_of(kernel, 0.98 * v, 0.2 * d, 0.02 * v))
    return starts


def default_bounds(kernel: Kernel, scale: DataScale) -> list[tuple[float, float]]:
    """Log-scale bounds per parameter of theta, from the kernel's parameter declarations
    (``ParameterSpec.fit_range`` times the data scale it names; module docstring)."""
    scales = {"variance": scale.variance, "distance": scale.diameter}
    bounds: list[tuple[float, float]] = []
    for spec in kernel.PARAMETERS:
        if spec.shape or (spec.name == "nugget" and not kernel.has_nugget):
            continue
        count = len(kernel.lengthscale) if spec.per_coordinate else 1
        bounds += [spec.fit_bounds(scales[spec.fit_scale])] * count
    return bounds


def bounds_hit(theta: np.ndarray, bounds: Sequence[tuple[float, float]],
               names: Sequence[str]) -> tuple[str, ...]:
    """Names of the parameters within ``BOUND_HIT_LOG`` of a bound, with the side."""
    hit = []
    for value, (lo, hi), name in zip(theta, bounds, names, strict=True):
        if value - lo < BOUND_HIT_LOG:
            hit.append(f"{name} at lower bound {math.exp(lo):.4g}")
        elif hi - value < BOUND_HIT_LOG:
            hit.append(f"{name} at upper bound {math.exp(hi):.4g}")
    return tuple(hit)


@dataclass(frozen=True)
class StartResult:
    """One optimizer run: where it started, where it ended, how."""

    start: np.ndarray
    theta: np.ndarray
    loglik: float
    evaluations: int
    message: str

    def to_dict(self) -> dict[str, object]:
        return {"start": self.start.tolist(), "theta": self.theta.tolist(),
                "loglik": self.loglik, "evaluations": self.evaluations,
                "message": self.message}


@dataclass(frozen=True)
class MleFit:
    """The maximum-likelihood fit.

    Attributes
    ----------
    kernel : Kernel
        The model at the estimate.
    theta : ndarray
        Log-scale estimate (``kernel.param_names`` order).
    loglik : float
        Maximized log-likelihood by ``engine``.
    score : ndarray
        Score at the estimate (near zero at an interior maximum).
    engine : str
        ``dense`` or ``hodlr`` (with its tolerance in ``notes``).
    method : str
        ``L-BFGS-B`` or ``Fisher scoring``.
    starts : tuple of StartResult
    bounds : tuple of (float, float)
        Log-scale bounds used.
    bounds_hit : tuple of str
    evaluations : int
    seconds : float
    notes : tuple of str
    fisher : ndarray or None
        Fisher information at the estimate when the method computed it.
    converged : bool
        The stopping rule was met (Fisher scoring: ``step_se <= score_tol_se``; L-BFGS-B:
        scipy's success flag).
    step_se : float
        max_i |(F^-1 g)_i| / SE_i at the estimate over the free parameters: the score in
        SE units (NaN when no Fisher information was computed).
    score_tol_se : float
        The stated tolerance on ``step_se``.
    accepted_steps : int
        Fisher-scoring steps that were accepted by the line search.
    """

    kernel: Kernel
    theta: np.ndarray
    loglik: float
    score: np.ndarray
    engine: str
    method: str
    starts: tuple[StartResult, ...]
    bounds: tuple[tuple[float, float], ...]
    bounds_hit: tuple[str, ...]
    evaluations: int
    seconds: float
    notes: tuple[str, ...] = ()
    fisher: np.ndarray | None = None
    converged: bool = True
    step_se: float = math.nan
    score_tol_se: float = math.nan
    accepted_steps: int = 0

    def to_dict(self) -> dict[str, object]:
        return {"params": self.kernel.natural_params(), "theta": self.theta.tolist(),
                "converged": self.converged,
                "step_se": self.step_se if math.isfinite(self.step_se) else None,
                "score_tol_se": (self.score_tol_se if math.isfinite(self.score_tol_se)
                                 else None),
                "accepted_steps": self.accepted_steps,
                "param_names": list(self.kernel.param_names), "loglik": self.loglik,
                "score": self.score.tolist(), "engine": self.engine, "method": self.method,
                "starts": [s.to_dict() for s in self.starts],
                "bounds": [list(b) for b in self.bounds], "bounds_hit": list(self.bounds_hit),
                "evaluations": self.evaluations, "seconds": self.seconds,
                "notes": list(self.notes)}


class _Objective:
    """-L and -g for scipy, one engine call per theta, failures as a large value."""

    def __init__(self, engine: Engine, penalty: float) -> None:
        self.engine, self.penalty = engine, penalty
        self.calls = 0
        self._last: tuple[np.ndarray, float, np.ndarray] | None = None

    def _eval(self, theta: np.ndarray) -> tuple[float, np.ndarray]:
        if self._last is not None and np.array_equal(self._last[0], theta):
            return self._last[1], self._last[2]
        self.calls += 1
        try:
            ev = self.engine(theta)
            value, grad = -ev.loglik, -np.asarray(ev.score, dtype=float)
            if not (math.isfinite(value) and np.all(np.isfinite(grad))):
                raise FloatingPointError("non-finite log-likelihood or score")
        except (np.linalg.LinAlgError, FloatingPointError, ValueError) as exc:
            log.debug("objective failed at theta=%s: %s", theta, exc)
            value, grad = self.penalty, np.zeros_like(theta)
        self._last = (np.array(theta, copy=True), value, grad)
        return value, grad

    def fun(self, theta: np.ndarray) -> float:
        return self._eval(theta)[0]

    def jac(self, theta: np.ndarray) -> np.ndarray:
        return self._eval(theta)[1]


def fit_mle(engine: Engine, kernel: Kernel, *, starts: Sequence[np.ndarray],
            bounds: Sequence[tuple[float, float]], max_iter: int = 200,
            gtol: float = 1e-6) -> MleFit:
    """Multi-start L-BFGS-B maximization of L(theta) with the engine's analytic score.

    Parameters
    ----------
    engine : callable
        ``engine(theta, fisher=False) -> EngineEvaluation`` (``DenseEngine``,
        ``CompressedEngine``).
    kernel : Kernel
        Template: family, shape parameters, isotropy and nugget status.
    starts, bounds : log-scale starting points and (low, high) per parameter.
    max_iter, gtol : L-BFGS-B options (``maxiter``, projected-gradient ``gtol``).

    Raises
    ------
    FitError
        When no start reached a finite log-likelihood.
    """
    t0 = time.perf_counter()
    bounds = tuple((float(lo), float(hi)) for lo, hi in bounds)
    results: list[StartResult] = []
    total = 0
    for start in starts:
        x0 = np.clip(np.asarray(start, dtype=float), [b[0] for b in bounds],
                     [b[1] for b in bounds])
        objective = _Objective(engine, penalty=1e30)
        res = optimize.minimize(objective.fun, x0, jac=objective.jac, method="L-BFGS-B",
                                bounds=bounds, options={"maxiter": max_iter, "gtol": gtol})
        total += objective.calls
        value = -float(res.fun)
        results.append(StartResult(start=x0, theta=np.asarray(res.x), loglik=value,
                                   evaluations=objective.calls, message=str(res.message)))
    finite = [r for r in results if math.isfinite(r.loglik) and r.loglik > -1e29]
    if not finite:
        raise FitError("the likelihood could not be evaluated at any start: "
                       + "; ".join(r.message for r in results))
    best = max(finite, key=lambda r: r.loglik)
    final = engine(best.theta)
    total += 1
    success = best.message.upper().startswith("CONVERGENCE")
    return MleFit(kernel=kernel.with_theta(best.theta), theta=best.theta,
                  loglik=final.loglik, score=np.asarray(final.score),
                  engine=getattr(engine, "name", "custom"), method="L-BFGS-B",
                  starts=tuple(results), bounds=bounds,
                  bounds_hit=bounds_hit(best.theta, bounds, kernel.param_names),
                  evaluations=total, seconds=time.perf_counter() - t0,
                  converged=success,
                  notes=() if success else (f"L-BFGS-B did not converge: {best.message}",))


def _free_step(theta: np.ndarray, score: np.ndarray, fisher: np.ndarray, lo: np.ndarray,
               hi: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Fisher-scoring step F^-1 g over the free parameters, and the free mask.

    A parameter within ``BOUND_HIT_LOG`` of a bound whose full step points out of the box
    is held fixed (projected Newton step, Bertsekas 1982, SIAM J. Control Optim. 20);
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


def _step_in_se(step: np.ndarray, fisher: np.ndarray, free: np.ndarray) -> float:
    if not np.any(free):
        return 0.0
    se = fisher_standard_errors(fisher)
    return float(np.max(np.abs(step[free]) / se[free]))


def _noise_in_se(score_se: np.ndarray | None, fisher: np.ndarray) -> float:
    """max_i SD((F^-1 g)_i) / SE_i of a stochastic score with independent component
    errors score_se (linear propagation; 0 for an exact score)."""
    if score_se is None:
        return 0.0
    f_inv = np.linalg.inv(0.5 * (fisher + fisher.T))
    sd = np.sqrt(np.diag(f_inv @ np.diag(np.asarray(score_se) ** 2) @ f_inv))
    return float(np.max(sd / np.sqrt(np.diag(f_inv))))


def fisher_scoring(engine: Engine, kernel: Kernel, theta0: np.ndarray, *,
                   bounds: Sequence[tuple[float, float]], max_steps: int = 20,
                   step_tol_se: float = 0.01) -> MleFit:
    """Maximize L from theta0 by Fisher scoring with a backtracking line search.

    theta <- theta + t F^-1 g (F the expected Fisher information at the current theta,
    from the engine; Longford 1987), t = 1, 1/2, .., 1/64, the first t whose L is not
    below the current one by more than 1e-8 nat (Armijo-type backtracking, Nocedal and
    Wright 2006, Algorithm 3.1, with a zero sufficient-decrease constant).

    Stopping rule (the score tolerance in SE units): converged when
    max_i |(F^-1 g)_i| / SE_i <= ``step_tol_se`` over the free parameters
    (``_free_step``). When the engine's score is stochastic (``EngineEvaluation.score_se``)
    the iteration also stops once the step is within 2 x the score's own noise in the
    same units (it cannot be driven below it); if that is above ``step_tol_se`` the fit
    is returned as not converged, with the noise floor stated (``MleFit.score_tol_se``).
    The search cannot stall silently: when no step length is accepted, or ``max_steps``
    is reached first, the fit is returned with ``converged = False`` and a note saying so
    (with the number of accepted steps).
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
    step_se = tol_se = math.nan
    for _ in range(max_steps + 1):
        fisher = np.asarray(current.fisher)
        step, free = _free_step(theta, np.asarray(current.score), fisher, lo, hi)
        step_se = _step_in_se(step, fisher, free)
        tol_se = max(step_tol_se, 2.0 * _noise_in_se(current.score_se, fisher))
        if step_se <= tol_se:
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
                         f"at {step_se:.3g} SE (tolerance {tol_se:.3g} SE): not converged")
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
    message = "; ".join(notes) or (f"converged: score {step_se:.2g} SE <= {tol_se:.3g} SE "
                                   f"after {accepted_steps} accepted step(s)")
    return MleFit(kernel=kernel.with_theta(theta), theta=theta, loglik=current.loglik,
                  score=np.asarray(current.score), engine=getattr(engine, "name", "custom"),
                  method="Fisher scoring",
                  starts=(StartResult(start=np.asarray(theta0, dtype=float), theta=theta,
                                      loglik=current.loglik, evaluations=calls,
                                      message=message),),
                  bounds=bounds, bounds_hit=bounds_hit(theta, bounds, kernel.param_names),
                  evaluations=calls, seconds=time.perf_counter() - t0, notes=tuple(notes),
                  fisher=current.fisher, converged=converged, step_se=step_se,
                  score_tol_se=tol_se, accepted_steps=accepted_steps)


@dataclass(frozen=True)
class StandardErrors:
    """Standard errors at the fit, log and natural scale, and the microergodic combination.

    ``microergodic`` / ``microergodic_se`` are c = s2 / l^(2 nu) and its delta-method SE
    (None for non-Matern or anisotropic kernels).
    """

    param_names: tuple[str, ...]
    log_se: np.ndarray
    natural_se: dict[str, float | list[float]]
    microergodic: float | None
    microergodic_se: float | None
    nu: float | None

    def to_dict(self) -> dict[str, object]:
        return {"log_se": dict(zip(self.param_names, self.log_se.tolist(), strict=True)),
                "natural_se": self.natural_se, "microergodic": self.microergodic,
                "microergodic_se": self.microergodic_se, "nu": self.nu}


def standard_errors(kernel: Kernel, fisher: np.ndarray) -> StandardErrors:
    """SEs from the expected Fisher information F at the fit (module docstring)."""
    f = 0.5 * (np.asarray(fisher, dtype=float) + np.asarray(fisher, dtype=float).T)
    cov = np.linalg.inv(f)
    log_se = np.sqrt(np.diag(cov))
    values = np.exp(kernel.theta)
    nat = values * log_se
    k = len(kernel.lengthscale)
    natural: dict[str, float | list[float]] = {"variance": float(nat[0])}
    natural["lengthscale"] = float(nat[1]) if k == 1 else [float(v) for v in nat[1:1 + k]]
    natural["nugget"] = float(nat[1 + k]) if kernel.has_nugget else 0.0
    nu = smoothness(kernel)
    micro = micro_se = None
    if nu is not None and kernel.isotropic:
        a = np.zeros(kernel.n_params)
        a[0], a[1] = 1.0, -2.0 * nu
        log_c = float(a @ kernel.theta)
        micro = math.exp(log_c)
        micro_se = micro * math.sqrt(float(a @ cov @ a))
    return StandardErrors(param_names=kernel.param_names, log_se=log_se, natural_se=natural,
                          microergodic=micro, microergodic_se=micro_se, nu=nu)


# -- the fit of a check: dense where it fits the budgets, compressed beyond -------------
#: Dense evaluations with the score a dense fit is estimated to need: the screened
#: starts, then L-BFGS-B from the best ``DENSE_FIT_STARTS`` of them (covaudit's estimate:
#: 38 evaluations in all were measured for a 3-parameter fit at n = 2,000).
LBFGS_EVALUATIONS = 20
#: Fisher-scoring polish steps estimated (each an evaluation with the Fisher information).
POLISH_EVALUATIONS = 3
#: L-BFGS-B runs from this many of the best screened starts.
DENSE_FIT_STARTS = 2
#: Default stopping tolerances of the score in SE units (``fisher_scoring``).
DENSE_SCORE_TOL_SE = 1e-3
COMPRESSED_SCORE_TOL_SE = 1e-2
#: Size of the subset timed to estimate the dense fit's cost.
_TIMING_N = 1536


@dataclass(frozen=True)
class FitPlan:
    """Which engine fits the check's model, and why."""

    engine: str                    # "dense" or "compressed"
    estimated_seconds: float       # of the dense fit (NaN when over the memory budget)
    time_budget: float
    reason: str

    def to_dict(self) -> dict[str, object]:
        return {"engine": self.engine,
                "estimated_dense_seconds": (self.estimated_seconds
                                            if math.isfinite(self.estimated_seconds) else None),
                "time_budget": self.time_budget, "reason": self.reason}


def estimate_dense_fit_seconds(points: np.ndarray, y: np.ndarray, kernel: Kernel, *,
                               mean: str, n_starts: int) -> float:
    """Seconds a dense fit at all n points is estimated to take.

    One evaluation with the score and one with the Fisher information are timed on
    m = min(n, 1536) of the points and scaled by (n / m)^3 (the Cholesky factor and the
    inverse dominate: O(n^3), Golub and Van Loan 2013, section 4.2); the count of
    evaluations is ``n_starts + DENSE_FIT_STARTS * LBFGS_EVALUATIONS`` with the score
    and ``POLISH_EVALUATIONS`` with the Fisher information (covaudit's estimate).
    """
    n = y.size
    m = min(n, _TIMING_N)
    # A first call on a few points compiles the kernel code, so it is not timed.
    DenseEngine(points[:32], y[:32], kernel, mean=mean)(kernel.theta, fisher=True)
    engine = DenseEngine(points[:m], y[:m], kernel, mean=mean)
    t0 = time.perf_counter()
    engine(kernel.theta)
    t_score = time.perf_counter() - t0
    t0 = time.perf_counter()
    engine(kernel.theta, fisher=True)
    t_fisher = time.perf_counter() - t0
    scale = (n / m) ** 3
    return scale * (t_score * (n_starts + DENSE_FIT_STARTS * LBFGS_EVALUATIONS)
                    + t_fisher * POLISH_EVALUATIONS)


def plan_fit(points: np.ndarray, y: np.ndarray, kernel: Kernel, *, mean: str,
             n_starts: int, memory_budget: int | None, time_budget: float) -> FitPlan:
    """Dense when the dense likelihood, score and Fisher information fit the memory
    budget and the estimated dense fit fits ``time_budget`` seconds; compressed else."""
    from harness.linalg.dense_budget import DenseBudgetError, check_dense_budget

    n = y.size
    try:
        check_dense_budget(n, budget=memory_budget, score=True, fisher=True,
                           n_params=kernel.n_params)
    except DenseBudgetError as exc:
        return FitPlan("compressed", math.nan, time_budget, f"dense fit over the memory "
                                                             f"budget: {exc}")
    seconds = estimate_dense_fit_seconds(points, y, kernel, mean=mean, n_starts=n_starts)
    if seconds > time_budget:
        return FitPlan("compressed", seconds, time_budget,
                       f"dense fit estimated at {seconds:.3g} s, over --fit-time-budget "
                       f"{time_budget:g} s")
    return FitPlan("dense", seconds, time_budget,
                   f"dense fit estimated at {seconds:.3g} s, within --fit-time-budget "
                   f"{time_budget:g} s and the memory budget")


def _screen(points: np.ndarray, y: np.ndarray, kernel: Kernel, starts: Sequence[np.ndarray],
            bounds: Sequence[tuple[float, float]], *, mean: str, keep: int,
            memory_budget: int | None) -> list[np.ndarray]:
    """The ``keep`` starts with the highest dense log-likelihood (values only)."""
    lo = np.array([b[0] for b in bounds])
    hi = np.array([b[1] for b in bounds])
    scored: list[tuple[float, int]] = []
    clipped = [np.clip(np.asarray(s, dtype=float), lo, hi) for s in starts]
    for i, theta in enumerate(clipped):
        try:
            value = dense_evaluate(points, y, kernel.with_theta(theta), mean=mean,
                                   score=False, memory_budget=memory_budget,
                                   certify=False).loglik
        except (np.linalg.LinAlgError, FloatingPointError, ValueError):
            value = -math.inf
        scored.append((value if math.isfinite(value) else -math.inf, i))
    scored.sort(reverse=True)
    return [clipped[i] for _, i in scored[:keep]]


def fit_dense(points: np.ndarray, y: np.ndarray, template: Kernel, *, mean: str,
              starts: Sequence[np.ndarray], bounds: Sequence[tuple[float, float]],
              memory_budget: int | None = None, max_iter: int = 200, max_steps: int = 20,
              score_tol_se: float = DENSE_SCORE_TOL_SE) -> MleFit:
    """The dense exact MLE of all points: starts screened by their log-likelihood,
    L-BFGS-B (``fit_mle``) from the best ``DENSE_FIT_STARTS``, polished by Fisher scoring
    with the exact score and Fisher information to ``score_tol_se`` SE."""
    engine = DenseEngine(points, y, template, mean=mean, memory_budget=memory_budget)
    best = _screen(points, y, template, starts, bounds, mean=mean, keep=DENSE_FIT_STARTS,
                   memory_budget=memory_budget)
    first = fit_mle(engine, template, starts=best, bounds=bounds, max_iter=max_iter,
                    gtol=1e-8)
    polish = fisher_scoring(engine, template, first.theta, bounds=bounds,
                            max_steps=max_steps, step_tol_se=score_tol_se)
    final = polish if polish.loglik >= first.loglik - 1e-8 else first
    notes = [*first.notes, *polish.notes]
    if not polish.converged:
        notes.append("dense fit not converged: " + polish.starts[0].message)
    return replace(final, method="L-BFGS-B + Fisher scoring", engine="dense",
                   starts=(*first.starts, *polish.starts),
                   evaluations=first.evaluations + polish.evaluations + len(starts),
                   seconds=first.seconds + polish.seconds, notes=tuple(notes),
                   fisher=polish.fisher, converged=polish.converged,
                   step_se=polish.step_se, score_tol_se=polish.score_tol_se,
                   accepted_steps=polish.accepted_steps)
