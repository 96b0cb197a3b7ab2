"""Radial correlation functions rho(r) of the scaled distance r and their log-scale slopes.

Every stationary family here is written as a function of the scaled distance
``r = ||(x - y) / l||`` (one length scale per coordinate, or one shared), in the
parameterization of scikit-learn's ``Matern``, ``RBF`` and ``RationalQuadratic``
kernels (Rasmussen and Williams 2006, *Gaussian Processes for Machine Learning*,
eqs. 4.9, 4.14, 4.17, 4.19).  Besides ``rho`` each family gives its *radial slope*

    s(r) = -r * d rho / d r,

which is the derivative of rho with respect to log l for an isotropic kernel. For an
anisotropic kernel, d rho / d log l_k = s(r) * (d_k / l_k)^2 / r^2 (chain rule on
r^2 = sum_k (d_k / l_k)^2), with the limit 0 at r = 0 since s(0) = 0 for all families.

The closed forms are vectorized numpy code; ``harness.model.kernels.assembly`` holds the
compiled versions used for large blocks.
"""

from __future__ import annotations

import numpy as np
from scipy import special

SQRT3 = np.sqrt(3.0)
SQRT5 = np.sqrt(5.0)


def exponential(r: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Matern 1/2: rho = exp(-r); s = r exp(-r)."""
    e = np.exp(-r)
    return e, r * e


def matern32(r: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Matern 3/2 (R&W eq. 4.17): with a = sqrt(3) r, rho = (1 + a) e^-a; s = a^2 e^-a."""
    a = SQRT3 * r
    e = np.exp(-a)
    return (1.0 + a) * e, a * a * e


def matern52(r: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Matern 5/2 (R&W eq. 4.17): a = sqrt(5) r, rho = (1 + a + a^2/3) e^-a;
    s = a^2 (1 + a) e^-a / 3."""
    a = SQRT5 * r
    e = np.exp(-a)
    return (1.0 + a + a * a / 3.0) * e, a * a * (1.0 + a) * e / 3.0


def gaussian(r: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Squared exponential (R&W eq. 4.9): rho = exp(-r^2/2); s = r^2 exp(-r^2/2)."""
    q = r * r
    e = np.exp(-0.5 * q)
    return e, q * e


def rational_quadratic(r: np.ndarray, alpha: float) -> tuple[np.ndarray, np.ndarray]:
    """Rational quadratic (R&W eq. 4.19): rho = (1 + r^2/(2 alpha))^-alpha;
    s = r^2 (1 + r^2/(2 alpha))^(-alpha-1)."""
    base = 1.0 + (r * r) / (2.0 * alpha)
    rho = base ** (-alpha)
    return rho, (r * r) * rho / base


#: Largest Matern smoothness evaluated; above it the kernel is refused (use the gaussian
#: kernel, the nu -> infinity limit). The large-order form below has no cancellation, so
#: the bound is about the meaning of nu, not accuracy: at 1e8 the Matern and Gaussian
#: correlations differ by less than r^4 / (4 nu) ~ 1e-8 for r <= 2.
MATERN_NU_MAX = 1e8
#: Order from which Debye's large-order expansion replaces scipy.special.kve.
LARGE_ORDER = 50.0


def _stirling_tail(v: float) -> float:
    """gammaln(v) - (v - 1/2) log v + v - log(2 pi) / 2, by Stirling's series
    (NIST DLMF 5.11.1) for v >= ``LARGE_ORDER`` (terms to v^-7: error below 1e-16)."""
    v2 = v * v
    return (1.0 / 12.0 - (1.0 / 360.0 - (1.0 / 1260.0 - 1.0 / (1680.0 * v2)) / v2) / v2) / v


def _large_order_log_corr(v: float, a: np.ndarray) -> np.ndarray:
    """log(c_v a^v K_v(a)), c_v = 2^(1-v) / Gamma(v), for large v without cancellation.

    Debye's uniform expansion (NIST DLMF 10.41.4, polynomials U_1..U_4 of DLMF 10.41.10)
    with z = a / v, R = sqrt(1 + z^2), p = 1 / R, w = R - 1 = z^2 / (1 + R), combined
    with Stirling's series for Gamma(v) (DLMF 5.11.1), reduces exactly to

        log(c_v a^v K_v(a)) = -tail(v) + v (log1p(w / 2) - w) + log(p) / 2
                              + log(sum_k (-1)^k U_k(p) / v^k),

    whose leading term v (log1p(w/2) - w) -> -a^2 / (4 v) is the Gaussian limit.
    """
    z = a / v
    root = np.sqrt(1.0 + z * z)
    w = z * z / (1.0 + root)
    p = 1.0 / root
    p2 = p * p
    u1 = p * (3.0 - 5.0 * p2) / 24.0
    u2 = p2 * (81.0 + p2 * (-462.0 + 385.0 * p2)) / 1152.0
    u3 = p * p2 * (30375.0 + p2 * (-369603.0 + p2 * (765765.0 - 425425.0 * p2))) / 414720.0
    u4 = p2 * p2 * (4465125.0 + p2 * (-94121676.0 + p2 * (349922430.0 + p2 * (
        -446185740.0 + 185910725.0 * p2)))) / 39813120.0
    series = 1.0 + (-u1 + (u2 + (-u3 + u4 / v) / v) / v) / v
    return (-_stirling_tail(v) + v * (np.log1p(0.5 * w) - w) + 0.5 * np.log(p)
            + np.log(series))


def _log_corr(v: float, a: np.ndarray) -> np.ndarray:
    """log(c_v a^v K_v(a)) for a > 0 and v > 0 (the Matern correlation in terms of a).

    Below ``LARGE_ORDER``: log c_v + v log a + log kve(v, a) - a (scipy.special.kve and
    gammaln; K_v(a) = kve(v, a) e^-a, so nothing underflows far out); where kve
    overflows (a vanishing argument) the small-argument form K_v(a) ~ Gamma(v)/2 (2/a)^v
    (NIST DLMF 10.30.2) gives log 1 = 0 to rounding. From ``LARGE_ORDER`` on,
    ``_large_order_log_corr``.
    """
    if v >= LARGE_ORDER:
        return _large_order_log_corr(v, a)
    log_c = (1.0 - v) * np.log(2.0) - special.gammaln(v)
    with np.errstate(divide="ignore", over="ignore", under="ignore", invalid="ignore"):
        scaled = special.kve(v, a)
        out = log_c + v * np.log(a) + np.log(scaled) - a
    bad = ~(np.isfinite(out) & (scaled > 0))
    out[bad] = 0.0
    return np.minimum(out, 0.0)


def matern_general(r: np.ndarray, nu: float) -> tuple[np.ndarray, np.ndarray]:
    """General Matern (R&W eq. 4.14) through the modified Bessel function K_nu, in logs.

    With a = sqrt(2 nu) r and c_nu = 2^(1-nu) / Gamma(nu) (K_nu as in NIST DLMF 10.25.2):
    rho = c_nu a^nu K_nu(a), and from d/da [a^nu K_nu(a)] = -a^nu K_{nu-1}(a)
    (NIST DLMF 10.29.4 with k = 1), s = -a d rho/da = c_nu a^(nu+1) K_{nu-1}(a)
    = a^2 / (2 (nu - 1)) * c_{nu-1} a^(nu-1) K_{nu-1}(a) for nu > 1 (since
    c_nu / c_{nu-1} = 1 / (2 (nu - 1))). Both are formed in log space (``_log_corr``:
    scipy.special.kve and gammaln, Debye's large-order expansion from nu = 50), so large
    nu neither overflows nor underflows and tends to the Gaussian limit exp(-r^2 / 2)
    (R&W p. 85). At r = 0 the limits rho = 1 and s = 0 are set explicitly. Raises
    ``ValueError`` for nu outside (0, ``MATERN_NU_MAX``].
    """
    if not (np.isfinite(nu) and 0.0 < nu <= MATERN_NU_MAX):
        raise ValueError(f"Matern smoothness nu = {nu!r} is outside the evaluated range "
                         f"(0, {MATERN_NU_MAX:g}]; for larger nu use the gaussian kernel, "
                         "the nu -> infinity limit")
    nu = float(nu)
    r = np.asarray(r, dtype=float)
    a = np.sqrt(2.0 * nu) * r
    positive = a > 0.0
    rho = np.ones_like(a)
    slope = np.zeros_like(a)
    ap = a[positive]
    with np.errstate(under="ignore"):
        rho[positive] = np.exp(_log_corr(nu, ap))
        if nu > 1.0:
            slope[positive] = np.exp(2.0 * np.log(ap) - np.log(2.0 * (nu - 1.0))
                                     + _log_corr(nu - 1.0, ap))
        else:  # K_{nu-1} = K_{1-nu} (DLMF 10.27.3), order below 1: kve is accurate
            log_c = (1.0 - nu) * np.log(2.0) - special.gammaln(nu)
            with np.errstate(divide="ignore", over="ignore", invalid="ignore"):
                value = np.exp(log_c + (nu + 1.0) * np.log(ap)
                               + np.log(special.kve(1.0 - nu, ap)) - ap)
            slope[positive] = np.nan_to_num(value, nan=0.0, posinf=0.0)
    return rho, slope
