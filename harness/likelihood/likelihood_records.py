"""Result records of the generic likelihood and kriging evaluations."""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field

import numpy as np

from harness.model.evaluation import fisher_standard_errors


def _arr(a: np.ndarray | None) -> object:
    return None if a is None else np.asarray(a).tolist()


@dataclass(frozen=True)
class LikelihoodEvaluation:
    """Log-likelihood, score and (optionally) Fisher information through a Factorization.

    Attributes
    ----------
    n : int
    param_names : tuple of str
        Order of ``score``, ``trace_estimate``, ``trace_stderr`` and ``fisher``.
    loglik, logdet, quadratic : float
        L, log det Sigma~ and r' Sigma~^-1 r (``harness.model.gls``).
    beta : ndarray
        GLS mean coefficients (empty for the zero mean).
    score : ndarray or None
        dL/dtheta_i with the trace terms below (None when not asked for).
    trace_estimate : ndarray or None
        tr(Sigma^-1 Sigma_i), for REML tr(P Sigma_i); exact or estimated.
    trace_stderr : ndarray or None
        Standard errors of ``trace_estimate`` (zeros for exact traces).
    fisher : ndarray or None
        1/2 tr(Sigma^-1 Sigma_i Sigma^-1 Sigma_j) (REML: P for Sigma^-1).
    trace_method : str
        ``exact``, ``hutchinson`` or ``hutchpp``.
    probes : int
        Products per parameter of the trace estimator (0 for exact).
    solves, matvecs : int
        Columns through factor operations and derivative products for the score.
    seconds : mapping
        ``logdet``, ``solve`` (whitening and a = Sigma^-1 r) and ``score``.
    notes : tuple of str
        How each quantity was obtained; generic members supplied for the solver.
    """

    n: int
    param_names: tuple[str, ...]
    loglik: float
    logdet: float
    quadratic: float
    beta: np.ndarray
    score: np.ndarray | None
    trace_estimate: np.ndarray | None
    trace_stderr: np.ndarray | None
    fisher: np.ndarray | None
    trace_method: str
    probes: int
    solves: int
    matvecs: int
    seconds: Mapping[str, float] = field(default_factory=dict)
    notes: tuple[str, ...] = ()

    @property
    def standard_errors(self) -> np.ndarray | None:
        """SE_i = sqrt((F^-1)_ii) of the log-scale parameters, when F is known."""
        if self.fisher is None:
            return None
        return fisher_standard_errors(self.fisher)

    def to_dict(self) -> dict[str, object]:
        return {
            "n": self.n, "param_names": list(self.param_names), "loglik": self.loglik,
            "logdet": self.logdet, "quadratic": self.quadratic, "beta": _arr(self.beta),
            "score": _arr(self.score), "trace_estimate": _arr(self.trace_estimate),
            "trace_stderr": _arr(self.trace_stderr), "fisher": _arr(self.fisher),
            "trace_method": self.trace_method, "probes": self.probes,
            "solves": self.solves, "matvecs": self.matvecs, "seconds": dict(self.seconds),
            "notes": list(self.notes),
        }


@dataclass(frozen=True)
class KrigingPrediction:
    """Kriging predictions at new points.

    Attributes
    ----------
    mean : ndarray, shape (m,)
        Predictive mean (the same for the latent field and a new observation).
    variance : ndarray, shape (m,)
        Predictive variance of the latent, noise-free field s2 R (clipped at 0).
    observation_variance : ndarray, shape (m,)
        Variance of a new noisy observation: ``variance + nugget``.
    beta : ndarray
        GLS mean coefficients used.
    notes : tuple of str
    """

    mean: np.ndarray
    variance: np.ndarray
    observation_variance: np.ndarray
    beta: np.ndarray
    notes: tuple[str, ...] = ()

    @property
    def std(self) -> np.ndarray:
        """Latent predictive standard deviation."""
        return np.sqrt(self.variance)

    def to_dict(self) -> dict[str, object]:
        return {"mean": _arr(self.mean), "variance": _arr(self.variance),
                "observation_variance": _arr(self.observation_variance),
                "beta": _arr(self.beta), "notes": list(self.notes)}
