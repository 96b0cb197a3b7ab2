"""The records of one model evaluation and of one kriging prediction, whoever computed them."""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field

import numpy as np


def fisher_standard_errors(fisher: np.ndarray) -> np.ndarray:
    """SE_i = sqrt((F^-1)_ii): asymptotic standard errors from the Fisher information
    (Cox and Hinkley 1974, *Theoretical Statistics*, section 9.2)."""
    return np.sqrt(np.diag(np.linalg.inv(np.asarray(fisher, dtype=float))))


def _listed(a: np.ndarray | None) -> object:
    return None if a is None else np.asarray(a).tolist()


@dataclass(frozen=True)
class ModelEvaluation:
    """Log-likelihood, score and Fisher information at one parameter vector.

    The one record of a model evaluation, whoever computed it: an exact reference
    (``dense``, ``statespace``, ``kronecker``) or a solver through the generic likelihood
    (``harness.likelihood``), whose traces may be estimated.

    Attributes
    ----------
    source : str
        What computed it: ``dense``, ``statespace``, ``kronecker`` or ``factorization``.
    n : int
    param_names : tuple of str
        Order of ``score``, ``trace_terms``, ``trace_stderr`` and ``fisher``
        (``Kernel.param_names``).
    loglik, logdet, quadratic : float
        L, log det Sigma and r' Sigma^-1 r (see ``harness.model.gls``).
    beta : ndarray
        GLS mean coefficients (empty for the zero mean).
    score : ndarray or None
        dL/dtheta_i.
    trace_terms : ndarray or None
        tr(Sigma^-1 dSigma/dtheta_i) (for REML: tr(P dSigma/dtheta_i)); exact or estimated.
    trace_stderr : ndarray or None
        Standard errors of ``trace_terms`` (zeros for exact traces, None when not known).
    fisher : ndarray or None
        Expected Fisher information 1/2 tr(Sigma^-1 Sigma_i Sigma^-1 Sigma_j).
    certificate : float or None
        Scaled Cholesky residual for the dense reference.
    trace_method : str
        ``exact``, ``hutchinson`` or ``hutchpp``.
    probes : int
        Products per parameter of a trace estimator (0 for exact traces).
    solves, matvecs : int
        Columns through factor operations and derivative products (generic likelihood).
    seconds : mapping of str to float
        Per-phase wall-clock seconds (``assemble``, ``factor``, ``certify``, ``score``...).
    notes : tuple of str
        How derived quantities were obtained (e.g. a finite-difference score's step).
    """

    source: str
    n: int
    param_names: tuple[str, ...]
    loglik: float
    logdet: float
    quadratic: float
    beta: np.ndarray
    score: np.ndarray | None = None
    trace_terms: np.ndarray | None = None
    trace_stderr: np.ndarray | None = None
    fisher: np.ndarray | None = None
    certificate: float | None = None
    trace_method: str = "exact"
    probes: int = 0
    solves: int = 0
    matvecs: int = 0
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
            "source": self.source, "n": self.n, "param_names": list(self.param_names),
            "loglik": self.loglik, "logdet": self.logdet, "quadratic": self.quadratic,
            "beta": _listed(self.beta), "score": _listed(self.score),
            "trace_terms": _listed(self.trace_terms),
            "trace_stderr": _listed(self.trace_stderr), "fisher": _listed(self.fisher),
            "certificate": self.certificate, "trace_method": self.trace_method,
            "probes": self.probes, "solves": self.solves, "matvecs": self.matvecs,
            "seconds": dict(self.seconds), "notes": list(self.notes),
        }


@dataclass(frozen=True)
class KrigingPrediction:
    """Kriging predictions at new points, whoever computed them.

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
        return {"mean": _listed(self.mean), "variance": _listed(self.variance),
                "observation_variance": _listed(self.observation_variance),
                "beta": _listed(self.beta), "notes": list(self.notes)}
