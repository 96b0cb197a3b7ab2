"""Exact products with a half-integer Matern covariance and its derivatives on a line, O(n).

For nu = p + 1/2 the Matern correlation is a polynomial times an exponential
(Rasmussen and Williams 2006, eq. 4.16):

    k(r) = s2 e^-s P(s),   s = a r,  a = sqrt(2 nu) / l,
    P(s) = p! / (2p)! sum_{q=0}^{p} (p + q)! / (q! (p - q)!) (2 s)^(p - q),

so P = 1, 1 + s, 1 + s + s^2/3 for nu = 1/2, 3/2, 5/2. Its derivatives in the log
parameters keep that form: d/d log s2 gives s2 e^-s P(s); d/d log l, since ds/d log l =
-s, gives s2 e^-s s (P(s) - P'(s)); d/d log tau2 gives tau2 I.

Any kernel e^-s Q(s) with a polynomial Q of degree D applied to a vector z on sorted
points u_i = a x_i splits into the points at or before i and those after it. With
M_t(i) = sum_{j <= i} e^-(u_i - u_j) (u_i - u_j)^t z_j and delta = u_i - u_{i-1}, the
binomial theorem gives the forward recursion

    M_t(i) = e^-delta sum_{t' <= t} C(t, t') delta^(t - t') M_t'(i - 1) + [t = 0] z_i,

and a backward one for the points after i: O(n D^2) per column, every term a product of
non-negative factors bounded by the kernel's own values (semiseparable structure;
Vandebril, Van Barel and Mastronardi 2008, *Matrix Computations and Semiseparable
Matrices*, vol. 1, ch. 1, "from memory"). These products are exact up to rounding; the
tests compare them with dense products of the kernel's own entries and derivatives.
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit

from harness.model.kernels import Kernel


class LineProductError(ValueError):
    """The kernel or points are not of the form these products cover."""


def matern_polynomial(p: int) -> np.ndarray:
    """Coefficients c_q of P(s) = sum_q c_q s^q for nu = p + 1/2 (module docstring)."""
    out = np.zeros(p + 1)
    scale = math.factorial(p) / math.factorial(2 * p)
    for q in range(p + 1):
        out[p - q] = (scale * math.factorial(p + q) / (math.factorial(q) * math.factorial(p - q))
                      * 2.0 ** (p - q))
    return out


def lengthscale_polynomial(coefficients: np.ndarray) -> np.ndarray:
    """Coefficients of s (P(s) - P'(s)), the log-length-scale derivative's polynomial."""
    p = np.asarray(coefficients, dtype=float)
    derivative = np.zeros_like(p)
    derivative[:-1] = p[1:] * np.arange(1, p.size)
    return np.concatenate([[0.0], p - derivative])


@njit(cache=True)
def _shift(state: np.ndarray, delta: float, binom: np.ndarray, powers: np.ndarray,
           shifted: np.ndarray) -> None:
    """M_t <- e^-delta sum_{t' <= t} C(t, t') delta^(t - t') M_t' for every column, in
    place (the module docstring's recursion)."""
    d, k = state.shape
    decay = math.exp(-delta)
    powers[0] = 1.0
    for t in range(1, d):
        powers[t] = powers[t - 1] * delta
    for t in range(d):
        for c in range(k):
            acc = 0.0
            for s in range(t + 1):
                acc += binom[t, s] * powers[t - s] * state[s, c]
            shifted[t, c] = decay * acc
    state[:, :] = shifted


@njit(cache=True)
def _exp_poly_product(u: np.ndarray, coefficients: np.ndarray, z: np.ndarray) -> np.ndarray:
    n, k = z.shape
    d = coefficients.size
    out = np.zeros((n, k))
    binom = np.zeros((d, d))
    for t in range(d):
        binom[t, 0] = 1.0
        for s in range(1, t + 1):
            binom[t, s] = binom[t - 1, s - 1] + (binom[t - 1, s] if s < t else 0.0)
    powers = np.empty(d)
    shifted = np.zeros((d, k))
    forward = np.zeros((d, k))       # the points at or before i
    for i in range(n):
        if i > 0:
            _shift(forward, u[i] - u[i - 1], binom, powers, shifted)
        for c in range(k):
            forward[0, c] += z[i, c]
            acc = 0.0
            for t in range(d):
                acc += coefficients[t] * forward[t, c]
            out[i, c] = acc
    backward = np.zeros((d, k))      # the points after i
    for i in range(n - 2, -1, -1):
        for c in range(k):
            backward[0, c] += z[i + 1, c]
        _shift(backward, u[i + 1] - u[i], binom, powers, shifted)
        for c in range(k):
            acc = 0.0
            for t in range(d):
                acc += coefficients[t] * backward[t, c]
            out[i, c] += acc
    return out


class LineProducts:
    """Sigma V and Sigma_i V for a half-integer Matern kernel on 1D points, O(n) per column.

    Parameters
    ----------
    points : ndarray, shape (n,) or (n, 1)
    kernel : Kernel
        Exponential, Matern 3/2, Matern 5/2 or Matern with nu in 0.5, 1.5, 2.5, with the
        parameters log_variance, log_lengthscale and (optionally) log_nugget.
    """

    def __init__(self, points: np.ndarray, kernel: Kernel) -> None:
        from harness.references.statespace import STATE_DIMENSION, smoothness

        x = np.asarray(points, dtype=float)
        if x.ndim == 2 and x.shape[1] == 1:
            x = x[:, 0]
        if x.ndim != 1:
            raise LineProductError(f"points on a line needed; got shape {np.shape(points)}")
        nu = smoothness(kernel)
        if nu not in STATE_DIMENSION or not kernel.isotropic:
            raise LineProductError(f"a half-integer Matern kernel with one length scale "
                                   f"is needed; got {kernel.describe()}")
        known = {"log_variance", "log_lengthscale", "log_nugget"}
        if not set(kernel.param_names) <= known:
            raise LineProductError(f"parameters {kernel.param_names}: only {sorted(known)} "
                                   "are covered")
        self.n = x.size
        self.n_params = kernel.n_params
        self._names = tuple(kernel.param_names)
        self._order = np.argsort(x, kind="stable")
        a = math.sqrt(2.0 * nu) / float(kernel.lengthscale[0])
        self._u = np.ascontiguousarray(a * x[self._order])
        self._variance = float(kernel.variance)
        self._nugget = float(kernel.nugget)
        self._poly = matern_polynomial(STATE_DIMENSION[nu] - 1)
        self._ls_poly = lengthscale_polynomial(self._poly)

    def _product(self, coefficients: np.ndarray, v: np.ndarray) -> np.ndarray:
        block = np.asarray(v, dtype=float)
        flat = block.reshape(self.n, -1)
        ordered = np.ascontiguousarray(flat[self._order])
        out = np.empty_like(flat)
        out[self._order] = self._variance * _exp_poly_product(self._u, coefficients, ordered)
        return out.reshape(block.shape)

    def matvec(self, v: np.ndarray) -> np.ndarray:
        """Sigma V (the nugget included)."""
        return self._product(self._poly, v) + self._nugget * np.asarray(v, dtype=float)

    def derivative_matvec(self, i: int, v: np.ndarray) -> np.ndarray:
        """dSigma/dtheta_i V for theta = the kernel's log parameters (module docstring)."""
        name = self._names[i]
        if name == "log_variance":
            return self._product(self._poly, v)
        if name == "log_lengthscale":
            return self._product(self._ls_poly, v)
        return self._nugget * np.asarray(v, dtype=float)


class LineCrossProducts:
    """K(x*, X) z = sum_j s2 R(x*_i, x_j) z_j at m new points, exactly in O(n + m).

    The kriging means' product with the cross-covariance: ``LineProducts`` on the union
    of the n observed and m new points, applied to z at the observed points and zero at
    the new ones, read at the new points. The nugget acts on the diagonal only, where the
    new rows hold zero, so what is read is the cross-covariance without the nugget; a new
    point at an observed coordinate gets s2 there, as k(X, x*) has it.

    Parameters
    ----------
    points : ndarray, shape (n,) or (n, 1)
    new_points : ndarray, shape (m,) or (m, 1)
    kernel : Kernel
        As for ``LineProducts`` (``LineProductError`` otherwise).
    """

    def __init__(self, points: np.ndarray, new_points: np.ndarray, kernel: Kernel) -> None:
        x = np.asarray(points, dtype=float).reshape(np.shape(points)[0], -1)
        x_new = np.asarray(new_points, dtype=float).reshape(np.shape(new_points)[0], -1)
        if x.shape[1] != 1 or x_new.shape[1] != 1:
            raise LineProductError(f"points on a line needed; got shapes {np.shape(points)} "
                                   f"and {np.shape(new_points)}")
        self.n, self.m = x.shape[0], x_new.shape[0]
        self._union = LineProducts(np.concatenate([x[:, 0], x_new[:, 0]]), kernel)

    def __call__(self, z: np.ndarray) -> np.ndarray:
        """K(x*, X) z for z of shape (n,) or (n, k)."""
        values = np.asarray(z, dtype=float)
        if values.shape[:1] != (self.n,):
            raise LineProductError(f"z: expected {self.n} rows, got shape {values.shape}")
        padded = np.zeros((self.n + self.m,) + values.shape[1:])
        padded[:self.n] = values
        return self._union.matvec(padded)[self.n:]
