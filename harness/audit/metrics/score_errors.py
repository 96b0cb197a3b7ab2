"""Score errors in statistical units: Fisher units, implied parameter shifts, nats.

At the maximum the exact score is zero, so a relative score error means nothing there
(DEVELOPERS.md, "How to add a metric"). Errors are put on the scale of the data's
information instead. With e = g~ - g the score error and F the expected Fisher information:

* Fisher units: e_i / sqrt(F_ii), the error in standard deviations of the score
  component (Var g_i = F_ii under the model; Cox and Hinkley 1974, *Theoretical
  Statistics*, section 4.8);
* implied parameter shift: dtheta = F^-1 e. A solver whose score is off by e moves the
  root of the score equation by dtheta to first order (one Fisher-scoring step,
  g~(theta^ + dtheta) ~ g~(theta^) - F dtheta = 0 when g(theta^) = 0), reported in
  units of SE_i = sqrt((F^-1)_ii);
* shift quadratic form: 1/2 dtheta' F dtheta = 1/2 e' F^-1 e, in nats: the drop in
  expected log-likelihood caused by moving the estimate by dtheta (second-order Taylor
  expansion of the log-likelihood at its maximum).

Microergodic combination (Zhang 2004, JASA 99, "Inconsistent estimation and
asymptotically equal interpolations in model-based geostatistics", Theorem 2): under
infill asymptotics for a Matern kernel with smoothness nu in d <= 3, s2 and l are not
consistently estimable but c = s2 / l^(2 nu) is. On the log scale
log c = a' theta with a = (1, -2 nu, 0...) over (log s2, log l, log tau2), so its shift
is a' dtheta and its standard error by the delta method is sqrt(a' F^-1 a).
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from harness.model.evaluation import fisher_standard_errors


class FisherError(ValueError):
    """The Fisher information is not a symmetric positive-definite p x p matrix."""


def _check(score_approx: np.ndarray, score_exact: np.ndarray, fisher: np.ndarray
           ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    ga = np.asarray(score_approx, dtype=float).ravel()
    ge = np.asarray(score_exact, dtype=float).ravel()
    f = np.asarray(fisher, dtype=float)
    p = ge.size
    if ga.shape != ge.shape or f.shape != (p, p):
        raise FisherError(f"score and Fisher shapes disagree: approx {ga.shape}, exact "
                          f"{ge.shape}, Fisher {f.shape}; expected ({p},), ({p},), ({p}, {p})")
    try:
        np.linalg.cholesky(0.5 * (f + f.T))
    except np.linalg.LinAlgError:
        raise FisherError(f"Fisher information is not positive definite: eigenvalues "
                          f"{np.linalg.eigvalsh(0.5 * (f + f.T))}") from None
    return ga, ge, 0.5 * (f + f.T)


@dataclass(frozen=True)
class ScoreErrors:
    """Score error in statistical units (see module docstring).

    Attributes
    ----------
    param_names : tuple of str
    error : ndarray
        g~ - g.
    fisher_units : ndarray
        (g~_i - g_i) / sqrt(F_ii).
    shift : ndarray
        dtheta = F^-1 (g~ - g), log scale.
    shift_se : ndarray
        dtheta_i / SE_i.
    shift_nats : float
        1/2 dtheta' F dtheta.
    relative_norm : float
        ||g~ - g|| / ||g|| (meaningful away from the maximum only).
    """

    param_names: tuple[str, ...]
    error: np.ndarray
    fisher_units: np.ndarray
    shift: np.ndarray
    shift_se: np.ndarray
    shift_nats: float
    relative_norm: float

    def to_dict(self, prefix: str = "score") -> dict[str, float]:
        out: dict[str, float] = {
            f"{prefix}_fisher_max": float(np.max(np.abs(self.fisher_units))),
            f"{prefix}_shift_se_max": float(np.max(np.abs(self.shift_se))),
            f"{prefix}_shift_nats": self.shift_nats,
            f"{prefix}_rel_error": self.relative_norm,
        }
        for i, name in enumerate(self.param_names):
            out[f"{prefix}_fisher[{name}]"] = float(self.fisher_units[i])
            out[f"{prefix}_shift_se[{name}]"] = float(self.shift_se[i])
        return out


def score_errors(score_approx: np.ndarray, score_exact: np.ndarray, fisher: np.ndarray,
                 param_names: Sequence[str]) -> ScoreErrors:
    """Score error of a solver in Fisher units, implied shifts and nats."""
    ga, ge, f = _check(score_approx, score_exact, fisher)
    e = ga - ge
    shift = np.linalg.solve(f, e)
    se = fisher_standard_errors(f)
    norm = float(np.linalg.norm(ge))
    return ScoreErrors(
        param_names=tuple(param_names), error=e, fisher_units=e / np.sqrt(np.diag(f)),
        shift=shift, shift_se=shift / se, shift_nats=0.5 * float(shift @ f @ shift),
        relative_norm=float(np.linalg.norm(e)) / norm if norm > 0 else math.nan,
    )


@dataclass(frozen=True)
class MicroergodicShift:
    """Shift of log(s2 / l^(2 nu)) implied by the score error, in nats of log c and in SE."""

    nu: float
    shift: float
    standard_error: float

    @property
    def shift_se(self) -> float:
        return self.shift / self.standard_error

    def to_dict(self) -> dict[str, float]:
        return {"microergodic_shift": self.shift, "microergodic_se": self.standard_error,
                "microergodic_shift_se": self.shift_se}


def microergodic_shift(shift: np.ndarray, fisher: np.ndarray, param_names: Sequence[str],
                       nu: float) -> MicroergodicShift:
    """a' dtheta and sqrt(a' F^-1 a) for a = d log(s2 / l^(2 nu)) / d theta (Zhang 2004).

    Needs an isotropic parameterization (``log_variance`` and ``log_lengthscale`` in
    ``param_names``); raises ValueError otherwise.
    """
    names = list(param_names)
    if "log_variance" not in names or "log_lengthscale" not in names:
        raise ValueError(f"microergodic combination needs log_variance and log_lengthscale "
                         f"(an isotropic kernel); got parameters {names}")
    a = np.zeros(len(names))
    a[names.index("log_variance")] = 1.0
    a[names.index("log_lengthscale")] = -2.0 * float(nu)
    f = 0.5 * (np.asarray(fisher, dtype=float) + np.asarray(fisher, dtype=float).T)
    se = math.sqrt(float(a @ np.linalg.solve(f, a)))
    return MicroergodicShift(nu=float(nu), shift=float(a @ np.asarray(shift)),
                             standard_error=se)
