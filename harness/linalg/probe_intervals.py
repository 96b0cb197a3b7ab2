"""Standard errors estimated from a few probes, stated so that 2 SE covers as 2 SD would.

The SE of a mean of k probe values, s / sqrt(k), is itself estimated from those k values.
For normally distributed values the error of the mean over that estimated SE follows
Student's t law with k - 1 degrees of freedom (Student 1908, Biometrika 6, 1-25), whose
tails are wider than the normal law's: with 16 probes, |error| <= 2 s / sqrt(k) holds
with probability 93.6%, not 95.4%. covaudit's verdicts read |e| <= 2 SE + b, so an SE
estimated from probes is stated as

    SE_stated = s / sqrt(k) * t_nu(Phi(2)) / 2,

with t_nu the t quantile and Phi the normal distribution function, so that 2 SE_stated
is the t interval of the normal 2-SD level. An SE combined from independent estimates
with their own degrees of freedom, SE^2 = sum v_i, takes the Welch-Satterthwaite
effective degrees of freedom nu = (sum v_i)^2 / sum (v_i^2 / nu_i) (Satterthwaite 1946,
Biometrics Bulletin 2, 110-114; Welch 1947, Biometrika 34, 28-35). The probe values of
Hutchinson-type estimators are not normal (Rademacher sums); the t law is the stated
model, checked against long-double truths in ``benchmarks/operator_honest_se.py``.
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np
from scipy import stats

#: The normal SD multiple the verdict rule takes for an uncertainty (|e| <= 2 SE + b).
RULE_SDS = 2.0


def t_inflation(dof: float | np.ndarray) -> float | np.ndarray:
    """t_nu(Phi(2)) / 2: the factor by which an SE estimated with ``dof`` degrees of
    freedom is stated (module docstring); 1 for infinite, inf for zero or fewer."""
    level = float(stats.norm.cdf(RULE_SDS))
    nu = np.asarray(dof, dtype=float)
    factor = np.where(nu > 0, stats.t.ppf(level, np.maximum(nu, 1e-12)) / RULE_SDS, np.inf)
    factor = np.where(np.isinf(nu), 1.0, factor)
    return float(factor) if factor.ndim == 0 else factor


def mean_standard_error(values: np.ndarray) -> float:
    """The stated SE of the mean of the probe ``values``: s / sqrt(k) times the t factor
    of k - 1 degrees of freedom (module docstring); inf for fewer than 2 values."""
    k = int(np.size(values))
    if k < 2:
        return math.inf
    return (float(np.std(values, ddof=1)) / math.sqrt(k)
            * float(t_inflation(k - 1)))


def satterthwaite_dof(variances: Sequence[float | np.ndarray],
                      dofs: Sequence[float]) -> float | np.ndarray:
    """nu = (sum v_i)^2 / sum (v_i^2 / nu_i) (module docstring); a term with v_i = 0
    adds nothing, and all-zero variances give infinite degrees of freedom."""
    parts = [np.asarray(v, dtype=float) for v in variances]
    total = sum(parts, np.zeros_like(parts[0]))
    denominator = sum((np.where(p > 0, p ** 2 / max(float(nu), 1e-300), 0.0)
                       for p, nu in zip(parts, dofs, strict=True)), np.zeros_like(total))
    with np.errstate(divide="ignore", invalid="ignore"):
        nu = np.where(denominator > 0, total ** 2 / denominator, math.inf)
    return float(nu) if nu.ndim == 0 else nu
