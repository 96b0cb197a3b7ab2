"""How far the at-scale fit's estimate lies from the exact MLE, measured with the exact
score that the reference computes at the estimate anyway.

Beyond the dense memory budget the fit stops at the Vecchia MLE (``vecchia_fit``): its
refinement needs an exact score per step, and the exact operator costs as much as the
whole reference stage per evaluation. But the reference evaluates the exact score g at
the estimate theta^ once, with its SE s (per component). One Fisher-scoring step from
there,

    delta = F^-1 g,

is the one-step estimate of the exact MLE's offset (Le Cam's one-step estimator;
Lehmann and Casella 1998, *Theory of Point Estimation*, 2nd ed., sec. 6.4), with F the
fit's Fisher information (the Vecchia one at the estimate, close to the exact one:
``vecchia_fit``'s module docstring). In SE units, SE_i = sqrt((F^-1)_ii):

    d_i = delta_i / SE_i,      u_i = sqrt((F^-1 S F^-1)_ii) / SE_i,   S = diag(s^2),

u_i the SE of d_i from the score's probe noise (the score's components share probes, so
S's off-diagonal terms are not zero; taking S diagonal is an approximation). The exact
log-likelihood gained by moving to the exact MLE, by the same quadratic model, is
g' F^-1 g / 2, whose mean under the score's noise exceeds the noiseless value by
tr(F^-1 S) / 2; that excess is subtracted (so the estimate can come out below 0 when the
noise dominates) and its SE is sqrt(delta' S delta) (first order).

The distance is *within* the fit's tolerance (``REFINE_TOL_SE``, 0.02 SE) when every
|d_i| + 2 u_i is at most the tolerance, *beyond* it when some |d_i| - 2 u_i exceeds it,
and *unresolved* otherwise: then the probes the score would need are stated, from the
SE falling as 1 / sqrt(probes).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

WITHIN = "within"
BEYOND = "beyond"
UNRESOLVED = "unresolved"


@dataclass(frozen=True)
class ExactDistance:
    """The estimate's offset from the exact MLE (module docstring).

    Attributes
    ----------
    param_names : tuple of str
    shift_se, uncertainty_se : tuple of float
        d_i and u_i, in SE units of each parameter.
    loglik_gap_nat, loglik_gap_se : float
        Exact log-likelihood to be gained at the exact MLE, and its SE.
    tolerance_se : float
    status : {"within", "beyond", "unresolved"}
    probes, probes_needed : int
        The probes behind the score's SE, and those that would resolve the status
        (``probes`` when resolved; 0 when no count can: a distance at the tolerance
        itself, or a score SE whose probe count is not known).
    """

    param_names: tuple[str, ...]
    shift_se: tuple[float, ...]
    uncertainty_se: tuple[float, ...]
    loglik_gap_nat: float
    loglik_gap_se: float
    tolerance_se: float
    status: str
    probes: int
    probes_needed: int

    def sentence(self) -> str:
        """One line for the check's notes."""
        worst = int(np.argmax(np.abs(self.shift_se)))
        head = (f"distance of the estimate to the exact MLE, from the exact score at it "
                f"(one Fisher-scoring step): largest {self.shift_se[worst]:+.3g} "
                f"+- {self.uncertainty_se[worst]:.2g} SE ({self.param_names[worst]}), "
                f"log-likelihood gap {self.loglik_gap_nat:.3g} +- {self.loglik_gap_se:.2g} "
                "nat")
        if self.status == WITHIN:
            return f"{head}: within {self.tolerance_se:g} SE"
        if self.status == BEYOND:
            return (f"{head}: beyond {self.tolerance_se:g} SE (the estimate is the Vecchia "
                    "MLE, not the exact one)")
        need = (f"about {self.probes_needed:,} would be needed to resolve it"
                if self.probes_needed else "no probe count is known to resolve it")
        return (f"{head}: not resolved against {self.tolerance_se:g} SE (the reference's "
                f"score SE comes from {self.probes} probes; {need})")

    def to_dict(self) -> dict[str, object]:
        return {"param_names": list(self.param_names), "shift_se": list(self.shift_se),
                "uncertainty_se": list(self.uncertainty_se),
                "loglik_gap_nat": self.loglik_gap_nat, "loglik_gap_se": self.loglik_gap_se,
                "tolerance_se": self.tolerance_se, "status": self.status,
                "probes": self.probes, "probes_needed": self.probes_needed}


def exact_distance(score: np.ndarray, score_se: np.ndarray, fisher: np.ndarray, *,
                   param_names: tuple[str, ...], tolerance_se: float,
                   probes: int) -> ExactDistance:
    """The offset of the exact MLE from the estimate where the exact score is ``score``
    with SE ``score_se``, in the metric of ``fisher`` (module docstring).

    Raises
    ------
    ValueError
        A score or SE that is not finite, or a Fisher information that is not positive
        definite: there is then no distance to state.
    """
    g = np.asarray(score, dtype=float).ravel()
    s = np.asarray(score_se, dtype=float).ravel()
    f = np.asarray(fisher, dtype=float)
    if g.size != s.size or f.shape != (g.size, g.size):
        raise ValueError(f"score ({g.size}), its SE ({s.size}) and the Fisher information "
                         f"{f.shape} do not match")
    if not (np.all(np.isfinite(g)) and np.all(np.isfinite(s)) and np.all(s >= 0)):
        raise ValueError("the exact score or its SE is not finite")
    try:
        inverse = np.linalg.inv(np.linalg.cholesky(0.5 * (f + f.T)))
    except np.linalg.LinAlgError as exc:
        raise ValueError("the Fisher information is not positive definite") from exc
    cov = inverse.T @ inverse                           # F^-1
    variance = s * s                                    # the diagonal of S
    se = np.sqrt(np.diag(cov))
    delta = cov @ g
    d = delta / se
    u = np.sqrt(np.einsum("ij,j,ji->i", cov, variance, cov)) / se   # diag(F^-1 S F^-1)
    gap = 0.5 * float(g @ delta) - 0.5 * float(np.diag(cov) @ variance)   # tr(F^-1 S)
    gap_se = float(math.sqrt(max(float(delta @ (variance * delta)), 0.0)))
    if np.all(np.abs(d) + 2 * u <= tolerance_se):
        status, needed = WITHIN, probes
    elif np.any(np.abs(d) - 2 * u > tolerance_se):
        status, needed = BEYOND, probes
    else:
        # the uncertainty falls as 1 / sqrt(probes): the count at which the least resolved
        # parameter's interval clears the tolerance on either side
        room = np.abs(np.abs(d) - tolerance_se)
        with np.errstate(divide="ignore"):
            factor = float(np.max(np.where(room > 0, (2 * u / room) ** 2, np.inf)))
        status = UNRESOLVED
        needed = (int(math.ceil(probes * factor)) if math.isfinite(factor) and probes > 0
                  else 0)
    return ExactDistance(param_names=tuple(param_names), shift_se=tuple(d.tolist()),
                         uncertainty_se=tuple(u.tolist()), loglik_gap_nat=gap,
                         loglik_gap_se=gap_se, tolerance_se=float(tolerance_se),
                         status=status, probes=int(probes), probes_needed=needed)
