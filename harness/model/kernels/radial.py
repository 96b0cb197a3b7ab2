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


def matern_general(r: np.ndarray, nu: float) -> tuple[np.ndarray, np.ndarray]:
    """General Matern (R&W eq. 4.14) through the modified Bessel function K_nu.

    With a = sqrt(2 nu) r and c = 2^(1-nu) / Gamma(nu):
    rho = c a^nu K_nu(a), and from d/da [a^nu K_nu(a)] = -a^nu K_{nu-1}(a)
    (NIST DLMF 10.29.4 with k = 1), s = -a d rho/da = c a^(nu+1) K_{nu-1}(a).
    At r = 0 the limits rho = 1 and s = 0 are set explicitly.
    """
    r = np.asarray(r, dtype=float)
    a = np.sqrt(2.0 * nu) * r
    positive = a > 0.0
    rho = np.ones_like(a)
    slope = np.zeros_like(a)
    ap = a[positive]
    log_c = (1.0 - nu) * np.log(2.0) - special.gammaln(nu)
    # K_nu underflows to zero far out; the product is then zero as it should be.
    with np.errstate(under="ignore", over="ignore", invalid="ignore"):
        rho[positive] = np.exp(log_c + nu * np.log(ap)) * special.kv(nu, ap)
        slope[positive] = np.exp(log_c + (nu + 1.0) * np.log(ap)) * special.kv(nu - 1.0, ap)
    np.nan_to_num(rho, copy=False, nan=0.0)
    np.nan_to_num(slope, copy=False, nan=0.0)
    return rho, slope
