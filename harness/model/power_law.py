"""Power-law fits t = exp(a) n^b with confidence, bootstrap and prediction intervals.

The fit is ordinary least squares of log t on log n over the per-size medians
(Montgomery, Peck & Vining, *Introduction to Linear Regression Analysis*, 5th ed.,
sections 2.2-2.4): with x = log n, y = log t, k sizes,

    b = Sxy / Sxx,  a = ybar - b xbar,  s^2 = sum(residual^2) / (k - 2),
    se(b) = s / sqrt(Sxx),  CI(b) = b +- t_{1-alpha/2, k-2} se(b),

and the prediction interval at x0 (their eq. 2.45)

    yhat0 +- t_{1-alpha/2, k-2} s sqrt(1 + 1/k + (x0 - xbar)^2 / Sxx).

The bootstrap interval resamples the per-repeat measurements within each size, takes the
median again and refits (percentile interval; Efron & Tibshirani, *An Introduction to the
Bootstrap*, 1993, ch. 13). Local slopes between consecutive sizes show curvature a single
exponent hides.

It sits below the stages that fit growth in n: the ``check`` pipeline (the log-likelihood
error over subsample sizes) and ``harness.analysis`` (time and error over a run's sizes).
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field

import numpy as np
from scipy import stats

#: Exponents a reader usually compares against (linear, n^1.5, quadratic, cubic).
REFERENCE_SLOPES: tuple[float, ...] = (1.0, 1.5, 2.0, 3.0)
MIN_SIZES = 3


class ScalingError(ValueError):
    """A scaling fit cannot be made from the data given."""


@dataclass(frozen=True)
class PowerLawFit:
    """A fitted log t = a + b log n over per-size medians.

    Attributes
    ----------
    sizes, values : tuple of float
        The distinct n and the per-size medians that were fitted.
    intercept, slope : float
        a and b.
    slope_se : float
        Standard error of b.
    ci_low, ci_high : float
        Student-t confidence interval of b with k - 2 degrees of freedom.
    boot_low, boot_high : float
        Percentile bootstrap interval of b over repeats; NaN without repeats.
    r_squared : float
    residual_sd : float
        s, the residual standard deviation on the log scale.
    level : float
        Confidence level of both intervals.
    local_slopes : tuple of float
        (log t_{j+1} - log t_j) / (log n_{j+1} - log n_j) for consecutive sizes.
    reference_inside : mapping of float to bool
        For each reference exponent, whether it lies inside [ci_low, ci_high].
    boot_slopes, boot_intercepts : tuple of float
        The bootstrap replicates (kept for crossover uncertainty).
    """

    sizes: tuple[float, ...]
    values: tuple[float, ...]
    intercept: float
    slope: float
    slope_se: float
    ci_low: float
    ci_high: float
    r_squared: float
    residual_sd: float
    level: float
    local_slopes: tuple[float, ...]
    reference_inside: Mapping[float, bool]
    boot_low: float = float("nan")
    boot_high: float = float("nan")
    boot_slopes: tuple[float, ...] = field(default=(), repr=False)
    boot_intercepts: tuple[float, ...] = field(default=(), repr=False)

    @property
    def k(self) -> int:
        return len(self.sizes)

    def predict(self, n: float | np.ndarray) -> np.ndarray:
        """exp(a) n^b."""
        return np.exp(self.intercept + self.slope * np.log(np.asarray(n, dtype=float)))

    def to_dict(self) -> dict[str, object]:
        return {
            "sizes": list(self.sizes), "values": list(self.values),
            "intercept": self.intercept, "slope": self.slope, "slope_se": self.slope_se,
            "ci_low": self.ci_low, "ci_high": self.ci_high, "boot_low": self.boot_low,
            "boot_high": self.boot_high, "r_squared": self.r_squared,
            "residual_sd": self.residual_sd, "level": self.level,
            "local_slopes": list(self.local_slopes),
            "reference_inside": {str(k): v for k, v in self.reference_inside.items()},
        }


@dataclass(frozen=True)
class Extrapolation:
    """A prediction of t at a size n0 with its prediction interval."""

    n: float
    value: float
    low: float
    high: float
    level: float
    extrapolated: bool  # n0 outside [min(sizes), max(sizes)]

    def to_dict(self) -> dict[str, object]:
        return {"n": self.n, "value": self.value, "low": self.low, "high": self.high,
                "level": self.level, "extrapolated": self.extrapolated}


def _ols(x: np.ndarray, y: np.ndarray) -> tuple[float, float, float, float, float]:
    """Return a, b, se(b), s, R^2 of y = a + b x (Montgomery et al., sec. 2.2)."""
    k = x.size
    xbar, ybar = x.mean(), y.mean()
    sxx = float(np.sum((x - xbar) ** 2))
    b = float(np.sum((x - xbar) * (y - ybar)) / sxx)
    a = float(ybar - b * xbar)
    resid = y - (a + b * x)
    sse = float(resid @ resid)
    s = float(np.sqrt(sse / (k - 2))) if k > 2 else float("nan")
    syy = float(np.sum((y - ybar) ** 2))
    r2 = 1.0 - sse / syy if syy > 0 else 1.0
    return a, b, s / np.sqrt(sxx), s, r2


def fit_power_law(
    sizes: Sequence[float],
    values: Sequence[float],
    *,
    repeats: Mapping[float, Sequence[float]] | None = None,
    level: float = 0.95,
    n_boot: int = 1000,
    rng: np.random.Generator | None = None,
    reference_slopes: Sequence[float] = REFERENCE_SLOPES,
) -> PowerLawFit:
    """Fit log t = a + b log n on per-size medians.

    Parameters
    ----------
    sizes, values : sequence of float
        One entry per measurement; several entries at one size are reduced to their median.
    repeats : mapping of size to sequence of float, optional
        Per-repeat measurements at each size, for the bootstrap interval.
    level : float
        Confidence level.
    n_boot : int
        Bootstrap replicates (ignored without ``repeats``).
    rng : numpy.random.Generator, optional
        Source of the bootstrap resampling; ``default_rng(rng)`` is applied.

    Raises
    ------
    ScalingError
        With fewer than three distinct sizes or non-positive values.
    """
    n_arr = np.asarray(sizes, dtype=float)
    v_arr = np.asarray(values, dtype=float)
    if n_arr.shape != v_arr.shape:
        raise ScalingError(f"sizes and values differ in length ({n_arr.size} vs {v_arr.size})")
    keep = np.isfinite(v_arr) & (v_arr > 0) & np.isfinite(n_arr) & (n_arr > 0)
    n_arr, v_arr = n_arr[keep], v_arr[keep]
    distinct = np.unique(n_arr)
    if distinct.size < MIN_SIZES:
        raise ScalingError(f"a scaling fit needs at least {MIN_SIZES} distinct sizes with "
                           f"positive values, got {distinct.size} "
                           f"({', '.join(str(int(s)) for s in distinct) or 'none'}); "
                           "add sizes to the case grid")
    med = np.array([np.median(v_arr[n_arr == s]) for s in distinct])
    x, y = np.log(distinct), np.log(med)
    a, b, se, s, r2 = _ols(x, y)
    tq = float(stats.t.ppf(0.5 + level / 2, distinct.size - 2))
    lo, hi = b - tq * se, b + tq * se
    local = tuple(float(v) for v in np.diff(y) / np.diff(x))
    inside = {float(r): bool(lo <= r <= hi) for r in reference_slopes}
    boot_lo = boot_hi = float("nan")
    boot_b: tuple[float, ...] = ()
    boot_a: tuple[float, ...] = ()
    if repeats is not None and n_boot > 0:
        samples = []
        for size in distinct:
            rep = np.asarray(repeats.get(float(size), ()), dtype=float)
            rep = rep[np.isfinite(rep) & (rep > 0)]
            samples.append(rep)
        if all(r.size >= 2 for r in samples):
            gen = np.random.default_rng(rng)
            yb = np.log(np.column_stack([
                np.median(r[gen.integers(0, r.size, size=(n_boot, r.size))], axis=1)
                for r in samples]))
            xc = x - x.mean()
            bs = (yb - yb.mean(axis=1, keepdims=True)) @ xc / float(xc @ xc)
            as_ = yb.mean(axis=1) - bs * x.mean()
            tail = 50 * (1 - level)
            boot_lo, boot_hi = (float(q) for q in np.percentile(bs, [tail, 100 - tail]))
            boot_b, boot_a = tuple(bs.tolist()), tuple(as_.tolist())
    return PowerLawFit(
        sizes=tuple(distinct.tolist()), values=tuple(med.tolist()), intercept=a, slope=b,
        slope_se=float(se), ci_low=float(lo), ci_high=float(hi), r_squared=float(r2),
        residual_sd=s, level=level, local_slopes=local, reference_inside=inside,
        boot_low=boot_lo, boot_high=boot_hi, boot_slopes=boot_b, boot_intercepts=boot_a)


def extrapolate(fit: PowerLawFit, n: float, *, level: float | None = None) -> Extrapolation:
    """Predict t at size ``n`` with a Student-t prediction interval (Montgomery eq. 2.45).

    Marked ``extrapolated`` when ``n`` lies outside the fitted sizes.
    """
    if not n > 0:
        raise ScalingError(f"extrapolation size must be positive, got {n}")
    lvl = fit.level if level is None else level
    x = np.log(np.asarray(fit.sizes))
    x0 = float(np.log(n))
    sxx = float(np.sum((x - x.mean()) ** 2))
    tq = float(stats.t.ppf(0.5 + lvl / 2, fit.k - 2))
    half = tq * fit.residual_sd * np.sqrt(1 + 1 / fit.k + (x0 - x.mean()) ** 2 / sxx)
    y0 = fit.intercept + fit.slope * x0
    return Extrapolation(n=float(n), value=float(np.exp(y0)), low=float(np.exp(y0 - half)),
                         high=float(np.exp(y0 + half)), level=lvl,
                         extrapolated=bool(n < min(fit.sizes) or n > max(fit.sizes)))
