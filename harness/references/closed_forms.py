"""Closed forms for the exponential kernel on 1D points (an AR(1) / Ornstein-Uhlenbeck process).

With k(x, x') = s2 exp(-|x - x'| / l), the process observed at sorted points
x_1 < .. < x_n is Markov: the Ornstein-Uhlenbeck exact discretization gives
f_i = rho_i f_{i-1} + e_i, rho_i = exp(-(x_i - x_{i-1}) / l), e_i ~ N(0, s2 (1 - rho_i^2)),
f_1 ~ N(0, s2) (a first-order autoregression with gap-dependent coefficient; Brockwell
and Davis 1991, *Time Series: Theory and Methods*, 2nd ed., sections 5.2 and 8.7, the
innovations form of the Gaussian likelihood in section 8.7). With v_1 = s2,
v_i = s2 (1 - rho_i^2) and rho_1 = 0:

    log det K = sum_i log v_i = n log s2 + sum_{i>=2} log(1 - rho_i^2),
    y' K^-1 y = sum_i (y_i - rho_i y_{i-1})^2 / v_i,

and K^-1 is tridiagonal: K^-1[i, i] = 1 / v_i + rho_{i+1}^2 / v_{i+1} (second term absent
for i = n), K^-1[i, i+1] = -rho_{i+1} / v_{i+1} (read off the quadratic form).

Derivatives on the log scale (theta = (log s2, log l)): d rho_i / d log l = rho_i c_i with
c_i = (x_i - x_{i-1}) / l, and d log v_i / d log l = -2 rho_i^2 c_i / (1 - rho_i^2), so

    tr(K^-1 dK/dlog s2) = n,   tr(K^-1 dK/dlog l) = d log det K / d log l
                                                   = -2 sum_{i>=2} rho_i^2 c_i / (1 - rho_i^2)

(Jacobi's formula). Fisher information: the score is a sum of conditional scores of
y_i | y_{i-1} ~ N(rho_i y_{i-1}, v_i), which are martingale differences, so
F = sum_i E[conditional information]. For a Gaussian with mean mu(theta) and variance
v(theta), that is E[d_a mu d_b mu] / v + 1/2 d_a log v d_b log v, and
E[(d rho_i y_{i-1})^2] = (rho_i c_i)^2 s2. Per step i >= 2 this gives
(1/2, -rho^2 c / (1 - rho^2), rho^2 c^2 (1 + rho^2) / (1 - rho^2)^2) for the
(s2 s2, s2 l, l l) entries, and f_1 adds 1/2 to (s2 s2):

    F_ss = n / 2,
    F_sl = -sum_{i>=2} rho_i^2 c_i / (1 - rho_i^2),
    F_ll = sum_{i>=2} rho_i^2 c_i^2 (1 + rho_i^2) / (1 - rho_i^2)^2.

On a regular grid with spacing h (rho = exp(-h / l), c = h / l) each sum is (n - 1) times
its term. No nugget: with tau2 > 0 the observations are no longer Markov.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np


class ClosedFormError(ValueError):
    """Points or parameters outside the closed forms' assumptions."""


@dataclass(frozen=True)
class ExponentialChain:
    """The AR(1) quantities rho_i, c_i and v_i of the exponential kernel on sorted points.

    Attributes
    ----------
    rho : ndarray, shape (n - 1,)
        exp(-(x_i - x_{i-1}) / l), i = 2..n.
    scaled_gaps : ndarray, shape (n - 1,)
        c_i = (x_i - x_{i-1}) / l.
    variance : float
        s2.
    """

    rho: np.ndarray
    scaled_gaps: np.ndarray
    variance: float

    @property
    def n(self) -> int:
        return self.rho.size + 1

    @property
    def log_one_minus_rho2(self) -> np.ndarray:
        """log(1 - rho_i^2) = log(-expm1(-2 c_i)), accurate for small gaps."""
        return np.log(-np.expm1(-2.0 * self.scaled_gaps))

    @property
    def one_minus_rho2(self) -> np.ndarray:
        return -np.expm1(-2.0 * self.scaled_gaps)


def exponential_chain(points: np.ndarray, *, variance: float, lengthscale: float
                      ) -> ExponentialChain:
    """The chain of strictly increasing 1D ``points`` (shape (n,) or (n, 1))."""
    x = np.asarray(points, dtype=float)
    if x.ndim == 2 and x.shape[1] == 1:
        x = x[:, 0]
    if x.ndim != 1 or x.size < 1:
        raise ClosedFormError(
            f"points: expected shape (n,) or (n, 1) with n >= 1, got {np.shape(points)}")
    gaps = np.diff(x)
    if np.any(gaps <= 0):
        raise ClosedFormError("points: the closed forms need strictly increasing coordinates "
                              f"(found {int(np.count_nonzero(gaps <= 0))} non-positive gap(s))")
    if not (variance > 0 and lengthscale > 0):
        raise ClosedFormError(
            f"variance and lengthscale must be > 0, got {variance!r}, {lengthscale!r}")
    c = gaps / lengthscale
    return ExponentialChain(rho=np.exp(-c), scaled_gaps=c, variance=float(variance))


def exponential_logdet(chain: ExponentialChain) -> float:
    """log det K = n log s2 + sum_{i>=2} log(1 - rho_i^2) (module docstring)."""
    return chain.n * float(np.log(chain.variance)) + float(np.sum(chain.log_one_minus_rho2))


def exponential_quadratic(chain: ExponentialChain, y: np.ndarray) -> float:
    """y' K^-1 y = sum_i (y_i - rho_i y_{i-1})^2 / v_i, O(n)."""
    y = np.asarray(y, dtype=float)
    if y.shape != (chain.n,):
        raise ClosedFormError(f"y: expected shape ({chain.n},), got {y.shape}")
    innov = y[1:] - chain.rho * y[:-1]
    return float(y[0] ** 2 + np.sum(innov ** 2 / chain.one_minus_rho2)) / chain.variance


def exponential_loglik(chain: ExponentialChain, y: np.ndarray) -> float:
    """-1/2 y' K^-1 y - 1/2 log det K - n/2 log(2 pi) (zero mean)."""
    return -0.5 * (exponential_quadratic(chain, y) + exponential_logdet(chain)
                   + chain.n * float(np.log(2.0 * np.pi)))


def exponential_precision(chain: ExponentialChain) -> tuple[np.ndarray, np.ndarray]:
    """K^-1 as (diagonal (n,), first off-diagonal (n-1,)); see module docstring."""
    v = np.concatenate([[chain.variance], chain.variance * chain.one_minus_rho2])
    diag = 1.0 / v
    diag[:-1] += chain.rho ** 2 / v[1:]
    return diag, -chain.rho / v[1:]


def exponential_trace_terms(chain: ExponentialChain) -> np.ndarray:
    """(tr(K^-1 dK/dlog s2), tr(K^-1 dK/dlog l)) = (n, -2 sum rho^2 c / (1 - rho^2))."""
    r2 = chain.rho ** 2
    return np.array([float(chain.n),
                     -2.0 * float(np.sum(r2 * chain.scaled_gaps / chain.one_minus_rho2))])


def exponential_fisher(chain: ExponentialChain) -> np.ndarray:
    """Expected Fisher information of (log s2, log l), 2 x 2 (module docstring)."""
    r2, c, q = chain.rho ** 2, chain.scaled_gaps, chain.one_minus_rho2
    f_ss = 0.5 * chain.n
    f_sl = -float(np.sum(r2 * c / q))
    f_ll = float(np.sum(r2 * c ** 2 * (1.0 + r2) / q ** 2))
    return np.array([[f_ss, f_sl], [f_sl, f_ll]])
