"""Maximum-likelihood fitting of the covariance parameters: starts, bounds, L-BFGS-B,
the dense exact fit and the standard errors at the fit.

The log-likelihood L(theta) (GLS mean profiled out, or REML) is maximized over the
log-scale parameters theta = (log s2, log l_1.., log tau2) by L-BFGS-B
(scipy.optimize.minimize; Byrd, Lu, Nocedal and Zhu 1995, SIAM J. Sci. Comput. 16)
with the analytic score g_i = 1/2 a' Sigma_i a - 1/2 tr(Sigma^-1 Sigma_i)
(Rasmussen and Williams 2006, eq. 5.9) from several starting points, and polished by
Fisher scoring (``harness.check.fisher_steps``). The engines that evaluate L live in
``harness.check.fit_engines``, the records in ``harness.check.fit_records``, the choice
of the fit in ``harness.check.fit_plan`` and the fit beyond the dense one in
``harness.check.vecchia_fit``.

Starting points and bounds are covaudit's own heuristics, from the data's spread:

* v = sample variance of the ordinary-least-squares residual of the mean model,
  D = diagonal of the coordinates' bounding box (the domain diameter);
* starts: (s2, l, tau2) = (0.8 v, f D, 0.2 v) for f in 0.05, 0.2, 0.5, and
  (0.98 v, 0.2 D, 0.02 v) for data with little noise;
* bounds: s2 in [1e-4 v, 1e3 v], l in [1e-4 D, 1e2 D], tau2 in [1e-8 v, 10 v].

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
from dataclasses import dataclass, replace

import numpy as np
from scipy import optimize

from harness.check.fisher_steps import fisher_scoring
from harness.check.fit_engines import (
    CompressedEngine,
    DenseEngine,
    Engine,
    EngineEvaluation,
    VecchiaEngine,
)
from harness.check.fit_records import (
    BOUND_HIT_LOG,
    FitError,
    FitStage,
    MleFit,
    StartResult,
    bounds_hit,
)
from harness.model import design_matrix
from harness.model.kernels import Kernel, smoothness
from harness.references import dense_evaluate

__all__ = [
    "BOUND_HIT_LOG",
    "DENSE_FIT_STARTS",
    "DENSE_SCORE_TOL_SE",
    "CompressedEngine",
    "DataScale",
    "DenseEngine",
    "Engine",
    "EngineEvaluation",
    "FitError",
    "FitStage",
    "MleFit",
    "StandardErrors",
    "StartResult",
    "VecchiaEngine",
    "bounds_hit",
    "data_scale",
    "default_bounds",
    "default_starts",
    "fisher_scoring",
    "fit_dense",
    "fit_mle",
    "standard_errors",
]

log = logging.getLogger(__name__)

#: L-BFGS-B runs from this many of the best screened starts (``fit_dense``).
DENSE_FIT_STARTS = 2
#: Default stopping tolerance of the dense fit's score in SE units (``fisher_scoring``).
DENSE_SCORE_TOL_SE = 1e-3


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


def _stop_at(deadline: float | None) -> Callable[[np.ndarray], None] | None:
    """An L-BFGS-B callback that stops the run once ``time.monotonic()`` passes
    ``deadline`` (None: no callback)."""
    if deadline is None:
        return None

    def stop(_theta: np.ndarray) -> None:
        if time.monotonic() > deadline:
            raise StopIteration("the fit's time budget was spent")

    return stop


def fit_mle(engine: Engine, kernel: Kernel, *, starts: Sequence[np.ndarray],
            bounds: Sequence[tuple[float, float]], max_iter: int = 200,
            gtol: float = 1e-6, deadline: float | None = None) -> MleFit:
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
    deadline : float or None
        A ``time.monotonic()`` value: an iteration past it stops L-BFGS-B (scipy's
        callback raising ``StopIteration``), which then reports no convergence.

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
                                bounds=bounds, options={"maxiter": max_iter, "gtol": gtol},
                                callback=_stop_at(deadline))
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


def screen_starts(value: Callable[[np.ndarray], float], starts: Sequence[np.ndarray],
                  bounds: Sequence[tuple[float, float]], *, keep: int) -> list[np.ndarray]:
    """The ``keep`` starts (clipped to the bounds) with the highest log-likelihood
    ``value(theta)``; a start where it fails or is not finite ranks last."""
    lo = np.array([b[0] for b in bounds])
    hi = np.array([b[1] for b in bounds])
    scored: list[tuple[float, int]] = []
    clipped = [np.clip(np.asarray(s, dtype=float), lo, hi) for s in starts]
    for i, theta in enumerate(clipped):
        try:
            loglik = value(theta)
        except (np.linalg.LinAlgError, FloatingPointError, ValueError):
            loglik = -math.inf
        scored.append((loglik if math.isfinite(loglik) else -math.inf, i))
    scored.sort(reverse=True)
    return [clipped[i] for _, i in scored[:keep]]


def screened_fit(engine: Engine, value: Callable[[np.ndarray], float], template: Kernel, *,
                 starts: Sequence[np.ndarray], bounds: Sequence[tuple[float, float]],
                 max_iter: int, max_steps: int, score_tol_se: float, time_budget: float,
                 method: str, what: str) -> MleFit:
    """An exact fit through ``engine``: the starts screened by ``value`` (the
    log-likelihood alone, ``screen_starts``), L-BFGS-B (``fit_mle``) from the best
    ``DENSE_FIT_STARTS`` with the engine's score, polished by the Fisher-scoring iteration
    (``fisher_scoring``) with the engine's metric to ``score_tol_se`` SE. Past
    ``time_budget`` seconds each stage stops and the fit reports no convergence.
    ``method`` labels the result, ``what`` names the fit in the note of a polish that did
    not converge; the engine's ``name`` is the result's engine."""
    t0 = time.perf_counter()
    deadline = time.monotonic() + time_budget if math.isfinite(time_budget) else None
    best = screen_starts(value, starts, bounds, keep=DENSE_FIT_STARTS)
    first = fit_mle(engine, template, starts=best, bounds=bounds, max_iter=max_iter,
                    gtol=1e-8, deadline=deadline)
    polish = fisher_scoring(engine, template, first.theta, bounds=bounds,
                            max_steps=max_steps, step_tol_se=score_tol_se,
                            deadline=deadline)
    final = polish if polish.loglik >= first.loglik - 1e-8 else first
    notes = [*first.notes, *polish.notes]
    if not polish.converged:
        notes.append(f"{what} not converged: " + polish.starts[0].message)
    return replace(final, method=method, engine=getattr(engine, "name", "custom"),
                   starts=(*first.starts, *polish.starts),
                   evaluations=first.evaluations + polish.evaluations + len(starts),
                   seconds=time.perf_counter() - t0, notes=tuple(notes),
                   fisher=polish.fisher, converged=polish.converged,
                   step_se=polish.step_se, score_tol_se=polish.score_tol_se,
                   accepted_steps=polish.accepted_steps)


def fit_dense(points: np.ndarray, y: np.ndarray, template: Kernel, *, mean: str,
              starts: Sequence[np.ndarray], bounds: Sequence[tuple[float, float]],
              memory_budget: int | None = None, max_iter: int = 200, max_steps: int = 20,
              score_tol_se: float = DENSE_SCORE_TOL_SE,
              time_budget: float = math.inf) -> MleFit:
    """The dense exact MLE of all points (``screened_fit`` with the dense Cholesky
    likelihood, its exact score and Fisher information)."""

    def dense_loglik(theta: np.ndarray) -> float:
        return dense_evaluate(points, y, template.with_theta(theta), mean=mean, score=False,
                              memory_budget=memory_budget, certify=False).loglik

    return screened_fit(DenseEngine(points, y, template, mean=mean,
                                    memory_budget=memory_budget),
                        dense_loglik, template, starts=starts, bounds=bounds,
                        max_iter=max_iter, max_steps=max_steps, score_tol_se=score_tol_se,
                        time_budget=time_budget, method="L-BFGS-B + Fisher scoring",
                        what="dense fit")
