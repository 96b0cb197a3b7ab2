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
from collections.abc import Callable, Sequence
from dataclasses import dataclass

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
    """L, g and F through the built-in HODLR solver, traces by Hutch++.

    The probes come from the same seed at every theta (common random numbers), so the
    estimated score is a smooth function of theta for the optimizer.
    """

    name = "hodlr"

    def __init__(self, points: np.ndarray, y: np.ndarray, kernel: Kernel, *, mean: str,
                 reml: bool = False, tol: float, probes: int = 32, seed: int = 0,
                 leaf_size: int = 128) -> None:
        self.points, self.y, self.kernel = points, y, kernel
        self.mean, self.reml, self.tol = mean, reml, tol
        self.probes, self.seed, self.leaf_size = probes, seed, leaf_size

    def __call__(self, theta: np.ndarray, *, fisher: bool = False) -> EngineEvaluation:
        from harness.likelihood import evaluate_likelihood
        from harness.solvers.hodlr import factorize

        start = time.perf_counter()
        model = self.kernel.with_theta(theta)
        fac = factorize(self.points, model, tol=self.tol, leaf_size=self.leaf_size,
                        rng=self.seed)
        ev = evaluate_likelihood(fac, self.points, self.y, model, mean=self.mean,
                                 reml=self.reml, trace="hutchpp", probes=self.probes,
                                 rng=self.seed + 1, fisher=fisher)
        return EngineEvaluation(loglik=ev.loglik, score=np.asarray(ev.score),
                                fisher=ev.fisher, seconds=time.perf_counter() - start)


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
    """Log-scale bounds per parameter (module docstring)."""
    v, d = scale.variance, scale.diameter
    bounds = [(math.log(1e-4 * v), math.log(1e3 * v))]
    bounds += [(math.log(1e-4 * d), math.log(1e2 * d))] * len(kernel.lengthscale)
    if kernel.has_nugget:
        bounds.append((math.log(1e-8 * v), math.log(10 * v)))
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

    def to_dict(self) -> dict[str, object]:
        return {"params": self.kernel.natural_params(), "theta": self.theta.tolist(),
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
    return MleFit(kernel=kernel.with_theta(best.theta), theta=best.theta,
                  loglik=final.loglik, score=np.asarray(final.score),
                  engine=getattr(engine, "name", "custom"), method="L-BFGS-B",
                  starts=tuple(results), bounds=bounds,
                  bounds_hit=bounds_hit(best.theta, bounds, kernel.param_names),
                  evaluations=total, seconds=time.perf_counter() - t0)


def fisher_scoring(engine: Engine, kernel: Kernel, theta0: np.ndarray, *,
                   bounds: Sequence[tuple[float, float]], max_steps: int = 6,
                   step_tol_se: float = 0.01) -> MleFit:
    """Maximize L from theta0 by Fisher scoring with step halving.

    theta <- theta + t F^-1 g (F the expected Fisher information at the current theta,
    from the engine), t = 1, 1/2, 1/4.. until L does not decrease by more than 1e-8
    nat; stops when every step component is below ``step_tol_se`` standard errors.
    """
    t0 = time.perf_counter()
    bounds = tuple((float(lo), float(hi)) for lo, hi in bounds)
    lo = np.array([b[0] for b in bounds])
    hi = np.array([b[1] for b in bounds])
    theta = np.clip(np.asarray(theta0, dtype=float), lo, hi)
    current = engine(theta, fisher=True)
    calls = 1
    notes: list[str] = []
    for _ in range(max_steps):
        fisher = np.asarray(current.fisher)
        step = np.linalg.solve(fisher, current.score)
        se = fisher_standard_errors(fisher)
        if np.max(np.abs(step) / se) < step_tol_se:
            break
        t = 1.0
        accepted = False
        while t > 1.0 / 64:
            trial_theta = np.clip(theta + t * step, lo, hi)
            trial = engine(trial_theta, fisher=True)
            calls += 1
            if trial.loglik >= current.loglik - 1e-8:
                theta, current, accepted = trial_theta, trial, True
                break
            t /= 2
        if not accepted:
            notes.append("Fisher scoring stopped: no step increased the log-likelihood")
            break
    return MleFit(kernel=kernel.with_theta(theta), theta=theta, loglik=current.loglik,
                  score=np.asarray(current.score), engine=getattr(engine, "name", "custom"),
                  method="Fisher scoring",
                  starts=(StartResult(start=np.asarray(theta0, dtype=float), theta=theta,
                                      loglik=current.loglik, evaluations=calls,
                                      message="; ".join(notes) or "converged"),),
                  bounds=bounds, bounds_hit=bounds_hit(theta, bounds, kernel.param_names),
                  evaluations=calls, seconds=time.perf_counter() - t0, notes=tuple(notes),
                  fisher=current.fisher)


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
