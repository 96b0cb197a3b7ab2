"""The records of a maximum-likelihood fit: one optimizer run, one stage, the whole fit.

A parameter within ``BOUND_HIT_LOG`` (log scale) of a bound is reported as hit: the
maximum is then on the boundary and standard errors from the Fisher information are not
meaningful for that parameter.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass

import numpy as np

from harness.model.kernels import Kernel

#: Relative distance (log scale) under which a parameter counts as on its bound.
BOUND_HIT_LOG = 1e-3


class FitError(RuntimeError):
    """No start of the optimizer produced a finite log-likelihood."""


def finite_or_none(value: float) -> float | None:
    """The value for JSON: None where it is not a finite number."""
    return value if math.isfinite(value) else None


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
class FitStage:
    """One stage of the at-scale fit (``harness.check.vecchia_fit``).

    Attributes
    ----------
    name : str
        ``vecchia pilot`` or ``exact refinement``.
    params : dict
        Natural-scale estimate at the end of the stage.
    theta : ndarray
        Its log-scale form.
    loglik : float
        The stage's own log-likelihood there (Vecchia's for the pilot).
    exact_loglik : float
        The exact log-likelihood there (NaN where the exact one was not evaluated).
    steps : int
        Accepted steps of the stage.
    converged : bool
        The stage's stopping rule was met.
    statistic : float
        The stopping statistic at the end: the Newton decrement lambda^2 / 2 in nats for
        the pilot, the distance sqrt(s' F s) in SE units for the refinement.
    tolerance : float
        Its stated threshold.
    note : str
    seconds : float
        Wall-clock seconds of the stage.
    """

    name: str
    params: Mapping[str, object]
    theta: np.ndarray
    loglik: float
    exact_loglik: float
    steps: int
    converged: bool
    statistic: float
    tolerance: float
    note: str
    seconds: float = math.nan

    def to_dict(self) -> dict[str, object]:
        return {"name": self.name, "params": dict(self.params), "theta": self.theta.tolist(),
                "loglik": finite_or_none(self.loglik),
                "exact_loglik": finite_or_none(self.exact_loglik), "steps": self.steps,
                "converged": self.converged, "statistic": finite_or_none(self.statistic),
                "tolerance": self.tolerance, "note": self.note,
                "seconds": finite_or_none(self.seconds)}


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
        Maximized log-likelihood by ``engine`` (the exact one after an exact refinement).
    score : ndarray
        Score at the estimate (near zero at an interior maximum).
    engine : str
        ``dense``, ``vecchia``, ``statespace`` or ``hodlr`` (with its tolerance in
        ``notes``).
    method : str
        ``L-BFGS-B``, ``Fisher scoring`` or a combination.
    starts : tuple of StartResult
    bounds : tuple of (float, float)
        Log-scale bounds used.
    bounds_hit : tuple of str
    evaluations : int
    seconds : float
    notes : tuple of str
    fisher : ndarray or None
        Fisher information at the estimate when the method computed it (for
        ``statespace`` the observed information).
    converged : bool
        The stopping rule was met (Fisher scoring: ``step_se <= score_tol_se`` or the
        Newton decrement below its threshold; L-BFGS-B: scipy's success flag; the
        at-scale fit: its last stage's rule).
    step_se : float
        max_i |(F^-1 g)_i| / SE_i at the estimate over the free parameters: the score in
        SE units (NaN when no Fisher information was computed).
    score_tol_se : float
        The stated tolerance on ``step_se``.
    accepted_steps : int
        Fisher-scoring steps that were accepted by the line search.
    decrement : float
        The Newton decrement lambda^2 / 2 = g' F^-1 g / 2 at the estimate, in nats
        (NaN when not computed).
    stages : tuple of FitStage
        The at-scale fit's stages (empty for the other methods).
    refinement : str
        What became of the exact refinement (empty for the other methods).
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
    decrement: float = math.nan
    stages: tuple[FitStage, ...] = ()
    refinement: str = ""

    def loglik_gap_nat(self) -> float:
        """Exact log-likelihood of the refined estimate minus that of the Vecchia pilot
        (NaN unless both were evaluated)."""
        if len(self.stages) < 2:
            return math.nan
        return self.stages[-1].exact_loglik - self.stages[0].exact_loglik

    def to_dict(self) -> dict[str, object]:
        out: dict[str, object] = {
            "params": self.kernel.natural_params(), "theta": self.theta.tolist(),
            "converged": self.converged, "step_se": finite_or_none(self.step_se),
            "score_tol_se": finite_or_none(self.score_tol_se),
            "accepted_steps": self.accepted_steps,
            "param_names": list(self.kernel.param_names), "loglik": self.loglik,
            "score": self.score.tolist(), "engine": self.engine, "method": self.method,
            "starts": [s.to_dict() for s in self.starts],
            "bounds": [list(b) for b in self.bounds], "bounds_hit": list(self.bounds_hit),
            "evaluations": self.evaluations, "seconds": self.seconds,
            "notes": list(self.notes), "newton_decrement": finite_or_none(self.decrement)}
        if self.stages:
            out.update(stages=[s.to_dict() for s in self.stages],
                       loglik_gap_nat=finite_or_none(self.loglik_gap_nat()),
                       refinement=self.refinement)
        return out
