"""The record every exact reference returns for one model evaluation."""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field

import numpy as np


def fisher_standard_errors(fisher: np.ndarray) -> np.ndarray:
    """SE_i = sqrt((F^-1)_ii): asymptotic standard errors from the Fisher information
    (Cox and Hinkley 1974, *Theoretical Statistics*, section 9.2)."""
    return np.sqrt(np.diag(np.linalg.inv(np.asarray(fisher, dtype=float))))


@dataclass(frozen=True)
class ReferenceEvaluation:
    """Exact log-likelihood, score and Fisher information at one parameter vector.

    Attributes
    ----------
    reference : str
        ``dense``, ``statespace`` or ``kronecker``.
    n : int
    param_names : tuple of str
        Order of ``score``, ``trace_terms`` and ``fisher`` (``Kernel.param_names``).
    loglik, logdet, quadratic : float
        L, log det Sigma and r' Sigma^-1 r (see ``harness.model.gls``).
    beta : ndarray
        GLS mean coefficients (empty for the zero mean).
    score : ndarray or None
        dL/dtheta_i.
    trace_terms : ndarray or None
        tr(Sigma^-1 dSigma/dtheta_i) (for REML: tr(P dSigma/dtheta_i)).
    fisher : ndarray or None
        Expected Fisher information 1/2 tr(Sigma^-1 Sigma_i Sigma^-1 Sigma_j).
    certificate : float or None
        Scaled Cholesky residual for the dense reference.
    seconds : mapping of str to float
        Per-phase wall-clock seconds (``assemble``, ``factor``, ``certify``, ``score``...).
    notes : tuple of str
        How derived quantities were obtained (e.g. a finite-difference score's step).
    """

    reference: str
    n: int
    param_names: tuple[str, ...]
    loglik: float
    logdet: float
    quadratic: float
    beta: np.ndarray
    score: np.ndarray | None = None
    trace_terms: np.ndarray | None = None
    fisher: np.ndarray | None = None
    certificate: float | None = None
    seconds: Mapping[str, float] = field(default_factory=dict)
    notes: tuple[str, ...] = ()

    @property
    def standard_errors(self) -> np.ndarray | None:
        """SE_i = sqrt((F^-1)_ii) of the log-scale parameters, when F is known."""
        if self.fisher is None:
            return None
        return fisher_standard_errors(self.fisher)

    def to_dict(self) -> dict[str, object]:
        def arr(a: np.ndarray | None) -> object:
            return None if a is None else np.asarray(a).tolist()

        return {
            "reference": self.reference, "n": self.n, "param_names": list(self.param_names),
            "loglik": self.loglik, "logdet": self.logdet, "quadratic": self.quadratic,
            "beta": arr(self.beta), "score": arr(self.score),
            "trace_terms": arr(self.trace_terms), "fisher": arr(self.fisher),
            "certificate": self.certificate, "seconds": dict(self.seconds),
            "notes": list(self.notes),
        }
