"""The Kalman log-likelihood in extended precision (``numpy.longdouble``), for auditing references.

The same model and recursions as ``statespace`` (Hartikainen and Sarkka 2010, IEEE MLSP,
eqs. 11-15; prediction-error decomposition, Harvey 1989, eq. 3.4.7),

    L = -1/2 sum_i (v_i^2 / S_i + log S_i) - n/2 log(2 pi),

but every operation in ``numpy.longdouble`` (on x86-64 the 80-bit format, unit roundoff
u_ld = 2^-64 ~ 5.4e-20, 2,048 times smaller than double's). It is a truth for the float64
references: the inputs (points, y, parameters) are the same float64 numbers, and the
result is the likelihood of exactly those inputs up to a rounding error about u_ld / u
of the float64 filter's. Where ``longdouble`` is plain double (some platforms), the
result says so (``unit_roundoff``) and is no more accurate than ``statespace``.

Model in closed form (no Lyapunov solve): for nu = p + 1/2 and lam = sqrt(2 nu) / l, the
stationary state covariance holds the kernel's derivatives at 0,
P_inf[a, b] = (-1)^b k^(a+b)(0) (zero when a + b is odd), that is

    nu = 1/2: P = s2,                          q_c = 2 lam s2
    nu = 3/2: P = diag(s2, lam^2 s2),          q_c = 4 lam^3 s2
    nu = 5/2: P = s2 [[1, 0, -k], [0, k, 0], [-k, 0, lam^4]], k = lam^2 / 3, q_c = 16/3 lam^5 s2

(Hartikainen and Sarkka 2010, eq. 15 solved for the companion form; Sarkka and Solin
2019, *Applied Stochastic Differential Equations*, section 12.3). The transition
A(dt) = e^{-lam dt} sum_k N^k dt^k / k! with N = F + lam I nilpotent, and
Q(dt) = q_c sum_{a,b} c_a c_b' J_{a+b}(dt), c_k = N^k e_m / k!, J_k(dt) = int_0^dt s^k
e^{-2 lam s} ds, as in ``statespace`` (J_k by the series of Abramowitz and Stegun 1964,
eq. 6.5.29, below x = 2 lam dt = 2, eq. 6.5.13 above).

The filter is a Python loop over the points (numpy has no compiled long-double path in
numba): about 30 microseconds a point for m <= 3, all data columns at once; the
covariance pass does not depend on y and is run once for any number of columns.

Score: ``longdouble_score`` takes Richardson-extrapolated central differences of the
long-double L on the log scale (Richardson 1911; Dahlquist and Bjorck 2008, *Numerical
Methods in Scientific Computing* I, section 3.4.2): D(h) = (L(t+h) - L(t-h)) / (2h),
R(h) = (4 D(h) - D(2h)) / 3 (truncation O(h^4)). Its stated error is
|R(h) - R(2h)| (R(2h) carries 16 times R(h)'s truncation, so the difference bounds it
with room) plus the rounding 8 u_ld |L| / h (four rounded values of L, each to a few
u_ld |L|, divided by the step) plus u (|theta_i| + 1) / h |R| (the float64 parameters
round theta_i +- h, so the step taken differs from h by that relative amount).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from harness.model.kernels.classes import Kernel, smoothness

LD = np.longdouble
#: pi to longdouble precision.
_PI_LD = LD("3.14159265358979323846264338327950288")
#: Log-scale step of the finite-difference score.
FD_STEP_LD = 1e-3


class LongDoubleKalmanError(ValueError):
    """Input the long-double Kalman likelihood cannot handle."""


@dataclass(frozen=True)
class LongDoubleLoglik:
    """Extended-precision log-likelihood pieces, one entry per data column.

    Attributes
    ----------
    loglik, quadratic : ndarray of longdouble, shape (k,)
        L and y' Sigma^-1 y per column.
    logdet : longdouble
        sum_i log S_i.
    unit_roundoff : float
        u of the format used (2^-64 for the 80-bit format).
    """

    loglik: np.ndarray
    quadratic: np.ndarray
    logdet: np.longdouble
    unit_roundoff: float


@dataclass(frozen=True)
class LongDoubleScore:
    """Finite-difference score of the long-double L (module docstring).

    Attributes
    ----------
    score : ndarray of float, shape (p, k)
        dL/dtheta_i per parameter (kernel.param_names order) and data column.
    error : ndarray of float, shape (p, k)
        Its stated error (truncation estimate plus the rounding term).
    step : float
    """

    score: np.ndarray
    error: np.ndarray
    step: float


def _model(kernel: Kernel) -> tuple[np.longdouble, np.ndarray, np.ndarray, np.ndarray]:
    """(lam, P_inf, nil_pow[k] = N^k / k!, noise[j] = q_c sum_{a+b=j} c_a c_b') in longdouble."""
    nu = smoothness(kernel)
    if nu not in (0.5, 1.5, 2.5) or not kernel.isotropic:
        raise LongDoubleKalmanError(
            f"kernel: the long-double Kalman likelihood needs an isotropic half-integer "
            f"Matern kernel (nu = 0.5, 1.5, 2.5); got {kernel.describe()}")
    m = int(nu + 0.5)
    s2 = LD(float(kernel.variance))
    lam = np.sqrt(LD(2) * LD(nu)) / LD(float(kernel.lengthscale[0]))
    if m == 1:
        pinf = np.array([[s2]], dtype=LD)
        qc = 2 * lam * s2
    elif m == 2:
        pinf = np.array([[s2, 0], [0, lam ** 2 * s2]], dtype=LD)
        qc = 4 * lam ** 3 * s2
    else:
        k = lam ** 2 / 3
        pinf = s2 * np.array([[1, 0, -k], [0, k, 0], [-k, 0, lam ** 4]], dtype=LD)
        qc = LD(16) / 3 * lam ** 5 * s2
    nil = np.zeros((m, m), dtype=LD)
    nil[np.arange(m - 1), np.arange(1, m)] = 1
    nil[m - 1] = [-math.comb(m, j) * lam ** (m - j) for j in range(m)]
    nil += lam * np.eye(m, dtype=LD)
    nil_pow = np.empty((m, m, m), dtype=LD)
    nil_pow[0] = np.eye(m, dtype=LD)
    for k in range(1, m):
        nil_pow[k] = nil_pow[k - 1] @ nil / k
    coeffs = [nil_pow[k][:, m - 1] for k in range(m)]  # N^k e_m / k!
    noise = np.zeros((2 * m - 1, m, m), dtype=LD)
    for a in range(m):
        for b in range(m):
            noise[a + b] += qc * np.outer(coeffs[a], coeffs[b])
    return lam, pinf, nil_pow, noise


def _lower_gamma_integrals(lam: np.longdouble, dt: np.ndarray, orders: int) -> np.ndarray:
    """J_k(dt), k < orders, shape (orders, len(dt)), in longdouble (module docstring)."""
    x: np.ndarray = 2 * lam * dt
    ex = np.exp(-x)
    small = x < 2
    out = np.empty((orders, dt.size), dtype=LD)
    first = np.ones(dt.size, dtype=LD)
    scale = 1 / (2 * lam)
    for k in range(orders):
        first = np.asarray(first * x / (k + 1), dtype=LD)
        term = np.ones(dt.size, dtype=LD)
        total = np.ones(dt.size, dtype=LD)
        for j in range(1, 60):  # x < 2: x^60 / 60! relative to 1 is far below u_ld
            term = np.asarray(term * x / (k + 1 + j), dtype=LD)
            total = total + term
        series = ex * first * total
        part = np.ones(dt.size, dtype=LD)
        term = np.ones(dt.size, dtype=LD)
        for j in range(1, k + 1):
            term = np.asarray(term * x / j, dtype=LD)
            part = part + term
        out[k] = scale * np.where(small, series, 1 - ex * part)
        scale = scale * (k + 1) / (2 * lam)
    return out


def longdouble_loglik(points: np.ndarray, y: np.ndarray, kernel: Kernel) -> LongDoubleLoglik:
    """L of a zero-mean GP with a half-integer Matern kernel on 1D points, in longdouble.

    Parameters
    ----------
    points : ndarray, shape (n,) or (n, 1)
    y : ndarray, shape (n,) or (n, k)
        One or more data columns (zero mean model).
    kernel : Kernel
        Exponential, Matern 3/2 or 5/2, one length scale, nugget >= 0.
    """
    x = np.asarray(points, dtype=float).reshape(-1)
    order = np.argsort(x, kind="stable")
    data = np.asarray(y, dtype=float).reshape(x.size, -1)[order].astype(LD)
    lam, pinf, nil_pow, noise_coef = _model(kernel)
    m = pinf.shape[0]
    xs = x[order].astype(LD)
    dt = np.concatenate([np.zeros(1, dtype=LD), np.diff(xs)])
    decay = np.exp(-lam * dt)
    powers = np.stack([dt ** k for k in range(m)])                      # (m, n)
    trans = decay[:, None, None] * np.einsum("kn,krc->nrc", powers, nil_pow)
    jk = _lower_gamma_integrals(lam, dt, 2 * m - 1)
    noise = np.einsum("kn,krc->nrc", jk, noise_coef)
    tau2 = LD(float(kernel.nugget))
    n, cols = data.shape
    mean = np.zeros((m, cols), dtype=LD)
    cov = pinf.copy()
    logdet = LD(0)
    quad = np.zeros(cols, dtype=LD)
    for i in range(n):
        if i:
            a = trans[i]
            mean = a @ mean
            cov = a @ cov @ a.T + noise[i]
        s = cov[0, 0] + tau2
        if not s > 0:
            raise LongDoubleKalmanError(f"singular: innovation variance {float(s):.3g} <= 0 "
                                        f"at sorted point {i}; add a nugget")
        v = data[i] - mean[0]
        gain = cov[:, 0] / s
        mean = mean + np.outer(gain, v)
        cov = cov - np.outer(gain, cov[0])
        logdet += np.log(s)
        quad += v * v / s
    loglik = -(quad + logdet + n * np.log(2 * _PI_LD)) / 2
    return LongDoubleLoglik(loglik=loglik, quadratic=quad, logdet=logdet,
                            unit_roundoff=float(np.finfo(LD).epsneg))


def longdouble_score(points: np.ndarray, y: np.ndarray, kernel: Kernel, *,
                     step: float = FD_STEP_LD) -> LongDoubleScore:
    """Richardson-extrapolated central differences of ``longdouble_loglik`` (module docstring)."""
    theta = kernel.theta
    cols = np.asarray(y, dtype=float).reshape(np.asarray(points).shape[0], -1).shape[1]
    score = np.empty((theta.size, cols))
    error = np.empty((theta.size, cols))
    base = longdouble_loglik(points, y, kernel)
    u = base.unit_roundoff
    h = LD(step)
    for i in range(theta.size):
        vals = {}
        for mult in (-4, -2, -1, 1, 2, 4):
            shifted = theta.copy()
            shifted[i] += mult * step
            vals[mult] = longdouble_loglik(points, y, kernel.with_theta(shifted)).loglik
        d1 = (vals[1] - vals[-1]) / (2 * h)
        d2 = (vals[2] - vals[-2]) / (4 * h)
        d4 = (vals[4] - vals[-4]) / (8 * h)
        r1 = (4 * d1 - d2) / 3
        r2 = (4 * d2 - d4) / 3
        score[i] = r1.astype(float)
        # the float64 parameters round theta +- h: relative step error u64 (|theta| + 1) / h
        step_rounding = np.finfo(float).epsneg * (abs(theta[i]) + 1) / step * np.abs(r1)
        error[i] = (np.abs(r1 - r2) + 8 * u * np.abs(base.loglik) / h).astype(float) \
            + step_rounding.astype(float)
    return LongDoubleScore(score=score, error=error, step=step)
