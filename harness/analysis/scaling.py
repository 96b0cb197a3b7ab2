"""Scaling of a run: power-law fits of time and error in n, and the dense crossover.

The fit itself (OLS of log t on log n over per-size medians, its confidence, bootstrap and
prediction intervals) is ``harness.model.power_law``, re-exported here. The crossover of
two fitted lines solves a1 + b1 x = a2 + b2 x; its interval is the percentile interval
over paired bootstrap replicates (Efron & Tibshirani, *An Introduction to the Bootstrap*,
1993, ch. 13).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from harness.model.power_law import (
    MIN_SIZES,
    REFERENCE_SLOPES,
    Extrapolation,
    PowerLawFit,
    ScalingError,
    extrapolate,
    fit_power_law,
)

__all__ = [
    "MIN_SIZES",
    "REFERENCE_SLOPES",
    "Crossover",
    "Extrapolation",
    "PowerLawFit",
    "ScalingError",
    "crossover",
    "extrapolate",
    "fit_power_law",
]


@dataclass(frozen=True)
class Crossover:
    """The size where a compressed solver becomes faster than the dense reference.

    ``fitted`` is where the two fitted lines meet (NaN when they do not meet at n > 1 with
    the compressed one cheaper beyond); ``low``/``high`` its bootstrap percentile interval
    (NaN without repeats); ``measured`` the log-log interpolation between the consecutive
    measured sizes where the ratio changes sign (NaN when it never does).
    """

    fitted: float
    low: float
    high: float
    measured: float
    level: float
    note: str = ""

    def to_dict(self) -> dict[str, object]:
        return {"fitted": self.fitted, "low": self.low, "high": self.high,
                "measured": self.measured, "level": self.level, "note": self.note}


def _meet(a1: float, b1: float, a2: float, b2: float) -> float:
    """n where a1 + b1 log n = a2 + b2 log n, when the first is cheaper beyond it."""
    if not b2 > b1:
        return float("nan")
    with np.errstate(over="ignore"):        # beyond float range: the lines meet at inf
        return float(np.exp((a1 - a2) / (b2 - b1)))


def crossover(fast: PowerLawFit, dense: PowerLawFit, *, level: float = 0.95) -> Crossover:
    """Size beyond which ``fast`` (the compressed solver) is cheaper than ``dense``.

    The fitted crossover solves a_f + b_f x = a_d + b_d x (requires b_d > b_f); its interval
    is the percentile interval over paired bootstrap replicates of both fits (replicates
    whose lines do not cross are counted as +inf, so a wide upper end shows as inf). The
    measured crossover interpolates log(t_f / t_d) linearly in log n between the first
    consecutive common sizes where it changes sign.
    """
    fitted = _meet(fast.intercept, fast.slope, dense.intercept, dense.slope)
    note = "" if np.isfinite(fitted) else "fitted lines do not cross (dense slope not larger)"
    low = high = float("nan")
    m = min(len(fast.boot_slopes), len(dense.boot_slopes))
    if m:
        reps = np.array([_meet(fast.boot_intercepts[i], fast.boot_slopes[i],
                               dense.boot_intercepts[i], dense.boot_slopes[i])
                         for i in range(m)])
        reps = np.where(np.isfinite(reps), reps, np.inf)
        tail = 50 * (1 - level)
        low, high = (float(q) for q in np.percentile(reps, [tail, 100 - tail]))
    common = sorted(set(fast.sizes) & set(dense.sizes))
    fv = dict(zip(fast.sizes, fast.values, strict=True))
    dv = dict(zip(dense.sizes, dense.values, strict=True))
    measured = float("nan")
    logr = [np.log(fv[s] / dv[s]) for s in common]
    for j in range(len(common) - 1):
        if logr[j] > 0 >= logr[j + 1]:
            x0, x1 = np.log(common[j]), np.log(common[j + 1])
            measured = float(np.exp(x0 + (x1 - x0) * logr[j] / (logr[j] - logr[j + 1])))
            break
    if not np.isfinite(measured) and logr and logr[0] <= 0:
        note = (note + "; " if note else "") + "compressed solver already faster at the " \
            "smallest common size"
    return Crossover(fitted=fitted, low=low, high=high, measured=measured, level=level,
                     note=note)
