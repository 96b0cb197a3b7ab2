"""Exact O(n) Gaussian log-likelihood of half-integer Matern kernels on 1D points (Kalman).

A Matern process with smoothness nu = p + 1/2 (p = 0, 1, 2: exponential, Matern 3/2,
Matern 5/2) is the first coordinate of the linear SDE dx = F x dt + L dW with state
x = (f, f', .., f^(p)), F in companion form with characteristic polynomial
(s + lam)^(p+1), lam = sqrt(2 nu) / l, and L = e_{p} (Hartikainen and Sarkka 2010,
"Kalman filtering and smoothing solutions to temporal Gaussian process regression
models", IEEE MLSP, eqs. 11-14). Observing y_i = f(x_i) + e_i, e_i ~ N(0, tau2), at sorted
points gives a linear-Gaussian state-space model whose Kalman filter yields the exact
likelihood through the prediction-error decomposition (Harvey 1989, *Forecasting,
Structural Time Series Models and the Kalman Filter*, eq. 3.4.7):

    L = -1/2 sum_i (v_i^2 / S_i + log S_i) - n/2 log(2 pi),

with innovations v_i and innovation variances S_i.

Score. The likelihood depends on the length scale only through the scaled gaps
tau_i = dt_i / l: the model with length scale l is the l = 1 model in time t / l, up to
a fixed similarity transform of the state, which leaves the innovations unchanged. In
the l = 1 coordinates dA(tau)/dtau = F A(tau) and dQ(tau)/dtau = A(tau) q_c L L' A(tau)'
(derivative of expm(F tau) and of the integral defining Q), so d/dlog l multiplies
these by -tau; P_inf and Q scale with s2, R = tau2. The filter's sensitivity equations
(Gupta and Mehra, IEEE Trans. Automatic Control 19 (1974) 774-783, sec. III; Sarkka,
*Bayesian Filtering and Smoothing*, 2013, sec. 12.3) carry dm, dP through prediction
and update and give dv_i, dS_i; then d log det / dtheta = sum_i dS_i / S_i and the
whitened data W^-1 y change by dv_i / sqrt(S_i) - v_i dS_i / (2 S_i^(3/2)).

Discretization, in closed form (no matrix exponential per step):

* Stationary covariance P_inf solves F P + P F' + q_c L L' = 0 (Hartikainen and Sarkka
  2010, eq. 15); it is solved once with q_c = 1 and rescaled so that P_inf[0, 0] = s2,
  which fixes q_c without the spectral-density constant.
* Transition A(dt) = expm(F dt). Since (F + lam I)^(p+1) = 0 (Cayley-Hamilton with the
  characteristic polynomial above), N = F + lam I is nilpotent and
  expm(F dt) = exp(-lam dt) sum_{k<=p} N^k dt^k / k!.
* Process noise Q(dt) = q_c int_0^dt g(s) g(s)' ds with g(s) = expm(F s) L
  = exp(-lam s) sum_k c_k s^k, c_k = N^k L / k!; hence
  Q = q_c sum_{a,b} c_a c_b' J_{a+b}(dt), J_k(dt) = int_0^dt s^k e^{-2 lam s} ds
  = k! / (2 lam)^(k+1) * P(k+1, 2 lam dt) with P the regularized lower incomplete gamma
  function (evaluated by its series at small argument). Unlike Q = P_inf - A P_inf A',
  this has no cancellation at small dt, so the zero-nugget likelihood of densely sampled
  smooth kernels keeps its digits.

The filter works on the points sorted in increasing order: unsorted input is sorted
internally (stable sort) and the data are permuted with it. ``whiten`` returns the
standardized innovations in sorted-point order; with P the sorting permutation and
L the (implicit) lower-triangular innovations factor of the sorted covariance,
W = P' L is a square root of Sigma (Sigma = W W'), which is all that
``harness.model.gls`` needs.
"""

from __future__ import annotations

import math
import time
from dataclasses import dataclass

import numba
import numpy as np
from scipy import linalg

from harness.model.evaluation import ModelEvaluation
from harness.model.gls import gls_loglik
from harness.model.kernels.classes import Kernel, smoothness
from harness.model.mean import design_matrix

#: Smoothness nu -> state dimension p + 1.
STATE_DIMENSION = {0.5: 1, 1.5: 2, 2.5: 3}

#: Log-scale step of the central finite-difference score, and Richardson's 2h partner.
FD_STEP = 1e-3


class StateSpaceError(ValueError):
    """Input the state-space reference cannot handle (dimension, family, singular model)."""


@dataclass(frozen=True)
class StateSpaceModel:
    """The continuous-time model of one half-integer Matern kernel.

    Attributes
    ----------
    lam : float
        sqrt(2 nu) / l.
    pinf : ndarray, shape (m, m)
        Stationary state covariance, P_inf[0, 0] = s2.
    nilpotent : ndarray, shape (m, m)
        N = F + lam I.
    noise_coefficients : ndarray, shape (2m - 1, m, m)
        q_c sum_{a+b=k} c_a c_b', the coefficient of J_k(dt) in Q(dt).
    """

    lam: float
    pinf: np.ndarray
    nilpotent: np.ndarray
    noise_coefficients: np.ndarray

    @property
    def m(self) -> int:
        return self.pinf.shape[0]


def matern_state_space(kernel: Kernel) -> StateSpaceModel:
    """Companion-form SDE of an isotropic half-integer Matern kernel (module docstring)."""
    nu = smoothness(kernel)
    if nu not in STATE_DIMENSION:
        raise StateSpaceError(
            f"kernel: the state-space reference needs a half-integer Matern kernel "
            f"(exponential, matern32, matern52 or matern with nu in 0.5, 1.5, 2.5); "
            f"got {kernel.describe()}"
        )
    if not kernel.isotropic:
        raise StateSpaceError(
            f"kernel: the state-space reference needs one length scale (1D points); "
            f"got {len(kernel.lengthscale)} length scales {kernel.lengthscale}"
        )
    m = STATE_DIMENSION[nu]
    lam = math.sqrt(2.0 * nu) / kernel.lengthscale[0]
    companion = np.zeros((m, m))
    companion[np.arange(m - 1), np.arange(1, m)] = 1.0
    # characteristic polynomial (s + lam)^m = sum_k binom(m, k) lam^(m-k) s^k
    companion[m - 1] = [-math.comb(m, k) * lam ** (m - k) for k in range(m)]
    unit_noise = np.zeros((m, m))
    unit_noise[m - 1, m - 1] = 1.0
    pinf_unit = linalg.solve_continuous_lyapunov(companion, -unit_noise)
    pinf_unit = 0.5 * (pinf_unit + pinf_unit.T)
    qc = kernel.variance / pinf_unit[0, 0]
    nil = companion + lam * np.eye(m)
    coeffs = []  # c_k = N^k L / k!
    vec = np.zeros(m)
    vec[m - 1] = 1.0
    for k in range(m):
        coeffs.append(vec / math.factorial(k))
        vec = nil @ vec
    noise = np.zeros((2 * m - 1, m, m))
    for a in range(m):
        for b in range(m):
            noise[a + b] += qc * np.outer(coeffs[a], coeffs[b])
    return StateSpaceModel(lam=lam, pinf=qc * pinf_unit, nilpotent=nil,
                           noise_coefficients=noise)


def discretize(model: StateSpaceModel, dt: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Transitions A(dt) and process noises Q(dt), shapes (len(dt), m, m), in closed form."""
    dt = np.ascontiguousarray(dt, dtype=float)
    m = model.m
    nil_pow = np.empty((m, m, m))
    nil_pow[0] = np.eye(m)
    for k in range(1, m):
        nil_pow[k] = nil_pow[k - 1] @ model.nilpotent / k  # N^k / k!
    trans = np.empty((dt.size, m, m))
    noise = np.empty((dt.size, m, m))
    _discretize(dt, model.lam, nil_pow, np.ascontiguousarray(model.noise_coefficients),
                trans, noise)
    return trans, noise


@numba.njit(cache=True)
def _lower_gamma_integrals(lam, dt, out):  # pragma: no cover - compiled
    """J_k(dt) = int_0^dt s^k e^{-2 lam s} ds = k! / (2 lam)^(k+1) P(k + 1, 2 lam dt), k < len(out).

    P(k+1, x) for integer k: the series e^-x x^(k+1) / (k+1)! sum_j x^j / ((k+2)..(k+1+j))
    for x < 2 (no cancellation at small x; Abramowitz and Stegun 1964, eq. 6.5.29), and
    1 - e^-x sum_{j<=k} x^j / j! otherwise (A&S eq. 6.5.13), where P >= P(5, 2) > 0.05.
    """
    x = 2.0 * lam * dt
    ex = math.exp(-x)
    first = 1.0  # x^(k+1) / (k+1)!, or the partial exponential sum
    scale = 1.0 / (2.0 * lam)  # k! / (2 lam)^(k+1)
    for k in range(out.size):
        if x < 2.0:
            first *= x / (k + 1)
            term = 1.0
            total = 1.0
            j = 1
            while term > 1e-17 * total:
                term *= x / (k + 1 + j)
                total += term
                j += 1
            p = ex * first * total
        else:
            total = 1.0
            term = 1.0
            for j in range(1, k + 1):
                term *= x / j
                total += term
            p = 1.0 - ex * total
        out[k] = scale * p
        scale *= (k + 1) / (2.0 * lam)


@numba.njit(cache=True)
def _discretize(dt, lam, nil_pow, noise_coefficients, trans, noise):  # pragma: no cover
    """Fill A(dt_i) = e^{-lam dt} sum_k dt^k N^k / k! and Q(dt_i) = sum_k J_k C_k."""
    m = nil_pow.shape[0]
    orders = noise_coefficients.shape[0]
    jk = np.empty(orders)
    for i in range(dt.size):
        h = dt[i]
        decay = math.exp(-lam * h)
        for r in range(m):
            for c in range(m):
                acc = 0.0
                power = 1.0
                for k in range(m):
                    acc += power * nil_pow[k, r, c]
                    power *= h
                trans[i, r, c] = decay * acc
        _lower_gamma_integrals(lam, h, jk)
        for r in range(m):
            for c in range(m):
                acc = 0.0
                for k in range(orders):
                    acc += jk[k] * noise_coefficients[k, r, c]
                noise[i, r, c] = acc


@numba.njit(cache=True)
def _product_rule(da, x, a, dx, out):  # pragma: no cover - compiled
    """out = dA X + A dX: the derivative of the product A X (m x m times m x c)."""
    for r in range(out.shape[0]):
        for c in range(out.shape[1]):
            acc = 0.0
            for k in range(a.shape[1]):
                acc += da[r, k] * x[k, c] + a[r, k] * dx[k, c]
            out[r, c] = acc


@numba.njit(cache=True)
def _covariance_pass(trans, noise, pinf, tau2, innov_var, gain):  # pragma: no cover - compiled
    """Kalman covariance recursion; returns -1, or the first index with S_i <= 0."""
    n = innov_var.shape[0]
    m = pinf.shape[0]
    filt = pinf.copy()
    pred = np.empty((m, m))
    tmp = np.empty((m, m))
    for i in range(n):
        if i == 0:
            pred[:, :] = pinf
        else:
            for r in range(m):
                for c in range(m):
                    acc = 0.0
                    for k in range(m):
                        acc += trans[i, r, k] * filt[k, c]
                    tmp[r, c] = acc
            for r in range(m):
                for c in range(r, m):
                    acc = noise[i, r, c]
                    for k in range(m):
                        acc += tmp[r, k] * trans[i, c, k]
                    pred[r, c] = acc
                    pred[c, r] = acc
        s = pred[0, 0] + tau2
        innov_var[i] = s
        if not s > 0.0:
            return i
        for r in range(m):
            gain[i, r] = pred[r, 0] / s
        for r in range(m):
            for c in range(r, m):
                v = pred[r, c] - pred[r, 0] * pred[0, c] / s
                filt[r, c] = v
                filt[c, r] = v
    return -1


@numba.njit(cache=True)
def _innovation_pass(trans, gain, innov_var, data, out):  # pragma: no cover - compiled
    """Standardized innovations v_i / sqrt(S_i) of each column of ``data``."""
    n, ncol = data.shape
    m = gain.shape[1]
    mean = np.zeros((m, ncol))
    pred = np.zeros((m, ncol))
    for i in range(n):
        if i > 0:
            for r in range(m):
                for j in range(ncol):
                    acc = 0.0
                    for k in range(m):
                        acc += trans[i, r, k] * mean[k, j]
                    pred[r, j] = acc
        sd = math.sqrt(innov_var[i])
        for j in range(ncol):
            v = data[i, j] - pred[0, j]
            out[i, j] = v / sd
            for r in range(m):
                mean[r, j] = pred[r, j] + gain[i, r] * v


#: What a parameter does to the step matrices (``_step_derivatives``).
SCALES_NOISE, SCALES_TIME, NOISE_ONLY = 0, 1, 2


@numba.njit(cache=True)
def _step_derivatives(kinds, tau, a, q, drift, growth, da, dq, work):  # pragma: no cover
    """dA_i, dQ_i for every parameter at one step (module docstring, "Score").

    ``SCALES_NOISE`` (log s2): dA = 0, dQ = Q. ``SCALES_TIME`` (log l, in the l = 1
    coordinates with scaled gap tau): dA = -tau F A, dQ = -tau A q_c L L' A'.
    ``NOISE_ONLY`` (log tau2): dA = dQ = 0. Formed per step, so the filter keeps no
    per-step derivative arrays (8 n m^2 bytes per parameter each); ``work`` (m x m)
    holds A q_c L L'.
    """
    m = a.shape[0]
    for j in range(kinds.shape[0]):
        for r in range(m):
            for c in range(m):
                da[j, r, c] = 0.0
                dq[j, r, c] = q[r, c] if kinds[j] == SCALES_NOISE else 0.0
        if kinds[j] != SCALES_TIME:
            continue
        for r in range(m):
            for c in range(m):
                acc = 0.0
                grown = 0.0
                for k in range(m):
                    acc += drift[r, k] * a[k, c]
                    grown += a[r, k] * growth[k, c]
                da[j, r, c] = -tau * acc
                work[r, c] = grown
        for r in range(m):
            for c in range(m):
                acc = 0.0
                for k in range(m):
                    acc += work[r, k] * a[c, k]
                dq[j, r, c] = -tau * acc


@numba.njit(cache=True)
def _sensitivity_pass(trans, noise, tau, kinds, drift, growth, pinf, dpinf, tau2, dr, data,
                      white, dwhite, dinnov):  # pragma: no cover - compiled
    """Kalman filter with its parameter sensitivities (module docstring, "Score").

    For each parameter j: dA_i, dQ_i from ``_step_derivatives`` (``kinds[j]``, scaled
    gaps ``tau``, drift F and growth q_c L L'), dP_0 = dpinf[j], dR = dr[j]. Fills
    white[i, c] = v_ic / sqrt(S_i), dwhite[j, i, c] its derivative and dinnov[j, i] =
    dS_i / dtheta_j; returns -1, or the first index with S_i <= 0.
    """
    n, ncol = data.shape
    m = pinf.shape[0]
    npar = dr.shape[0]
    dtrans = np.empty((npar, m, m))
    dnoise = np.empty((npar, m, m))
    work = np.empty((m, m))
    filt = pinf.copy()
    dfilt = dpinf.copy()
    pred = pinf.copy()
    dpred = dpinf.copy()
    tmp = np.empty((m, m))
    dtmp = np.empty((m, m))
    mean = np.zeros((m, ncol))
    dmean = np.zeros((npar, m, ncol))
    mpred = np.zeros((m, ncol))
    dmpred = np.zeros((npar, m, ncol))
    gain = np.empty(m)
    dgain = np.empty((npar, m))
    for i in range(n):
        if i > 0:
            a = trans[i]
            _step_derivatives(kinds, tau[i], a, noise[i], drift, growth, dtrans, dnoise, work)
            # P- = A P A' + Q; dP- = dA P A' + A dP A' + A P dA' + dQ
            for r in range(m):
                for c in range(m):
                    acc = 0.0
                    for k in range(m):
                        acc += a[r, k] * filt[k, c]
                    tmp[r, c] = acc
            for r in range(m):
                for c in range(m):
                    acc = noise[i, r, c]
                    for k in range(m):
                        acc += tmp[r, k] * a[c, k]
                    pred[r, c] = acc
            for j in range(npar):
                da = dtrans[j]
                _product_rule(da, filt, a, dfilt[j], dtmp)
                for r in range(m):
                    for c in range(m):
                        acc = dnoise[j, r, c]
                        for k in range(m):
                            acc += dtmp[r, k] * a[c, k] + tmp[r, k] * da[c, k]
                        dpred[j, r, c] = acc
            # m- = A m; dm- = dA m + A dm
            for r in range(m):
                for c in range(ncol):
                    acc = 0.0
                    for k in range(m):
                        acc += a[r, k] * mean[k, c]
                    mpred[r, c] = acc
            for j in range(npar):
                _product_rule(dtrans[j], mean, a, dmean[j], dmpred[j])
        s = pred[0, 0] + tau2
        if not s > 0.0:
            return i
        sd = math.sqrt(s)
        for r in range(m):
            gain[r] = pred[r, 0] / s
        for j in range(npar):
            ds = dpred[j, 0, 0] + dr[j]
            dinnov[j, i] = ds
            for r in range(m):
                dgain[j, r] = dpred[j, r, 0] / s - pred[r, 0] * ds / (s * s)
        for c in range(ncol):
            v = data[i, c] - mpred[0, c]
            white[i, c] = v / sd
            for j in range(npar):
                ds = dinnov[j, i]
                dv = -dmpred[j, 0, c]
                dwhite[j, i, c] = dv / sd - 0.5 * v * ds / (s * sd)
                for r in range(m):
                    dmean[j, r, c] = dmpred[j, r, c] + dgain[j, r] * v + gain[r] * dv
            for r in range(m):
                mean[r, c] = mpred[r, c] + gain[r] * v
        # P = P- - K S K'; dP = dP- - dK S K' - K dS K' - K S dK'
        for j in range(npar):
            ds = dinnov[j, i]
            for r in range(m):
                for c in range(m):
                    dfilt[j, r, c] = (dpred[j, r, c] - s * (dgain[j, r] * gain[c]
                                                             + gain[r] * dgain[j, c])
                                      - ds * gain[r] * gain[c])
        for r in range(m):
            for c in range(m):
                filt[r, c] = pred[r, c] - s * gain[r] * gain[c]
    return -1


def _as_1d_points(points: np.ndarray) -> np.ndarray:
    pts = np.asarray(points, dtype=float)
    if pts.ndim == 2 and pts.shape[1] == 1:
        pts = pts[:, 0]
    if pts.ndim != 1:
        raise StateSpaceError(
            f"points: the state-space reference needs 1-dimensional points, shape (n,) or "
            f"(n, 1); got shape {np.shape(points)}"
        )
    if pts.size == 0:
        raise StateSpaceError("points: got no points")
    if not np.all(np.isfinite(pts)):
        raise StateSpaceError("points: all coordinates must be finite")
    return pts


class StateSpaceReference:
    """Exact likelihood of a half-integer Matern kernel on 1D points by Kalman filtering.

    Parameters
    ----------
    points : ndarray, shape (n,) or (n, 1)
        Any order; sorted internally (see module docstring).
    kernel : Kernel
        Isotropic exponential, Matern 3/2 or Matern 5/2 (or ``Matern`` with nu = 0.5,
        1.5, 2.5), any nugget >= 0. With a zero nugget, repeated coordinates make Sigma
        singular and are refused.

    Cost O(n m^2) time and O(n m^2) memory (m = nu + 1/2 state dimension).
    """

    def __init__(self, points: np.ndarray, kernel: Kernel) -> None:
        x = _as_1d_points(points)
        self._points = x
        self._order = np.argsort(x, kind="stable")
        self._gaps = np.diff(x[self._order])
        self._setup(kernel)

    def _setup(self, kernel: Kernel) -> None:
        self.kernel = kernel
        model = matern_state_space(kernel)
        if kernel.nugget == 0.0 and self._gaps.size and np.min(self._gaps) == 0.0:
            dup = int(np.count_nonzero(self._gaps == 0.0))
            raise StateSpaceError(
                f"singular: {dup} repeated coordinate(s) with zero nugget make Sigma "
                f"singular; add a nugget (kernel nugget > 0)"
            )
        dt = np.concatenate([[0.0], self._gaps])
        self._trans, noise = discretize(model, dt)
        n = dt.size
        self._innov_var = np.empty(n)
        self._gain = np.empty((n, model.m))
        bad = _covariance_pass(self._trans, noise, model.pinf, kernel.nugget,
                               self._innov_var, self._gain)
        if bad >= 0:
            raise StateSpaceError(
                f"singular: innovation variance {self._innov_var[bad]:.3g} <= 0 at sorted "
                f"point {bad} (x = {self._points[self._order[bad]]:.17g}); Sigma is "
                f"numerically singular, add a nugget"
            )

    def with_kernel(self, kernel: Kernel) -> StateSpaceReference:
        """The same points (sorting reused) under another kernel."""
        new = object.__new__(StateSpaceReference)
        new._points, new._order, new._gaps = self._points, self._order, self._gaps
        new._setup(kernel)
        return new

    @property
    def n(self) -> int:
        return self._points.size

    @property
    def order(self) -> np.ndarray:
        """The sorting permutation: ``whiten`` output row i belongs to point order[i]."""
        return self._order

    @property
    def innovation_variances(self) -> np.ndarray:
        """S_i in sorted-point order."""
        return self._innov_var

    def logdet(self) -> float:
        """log det Sigma = sum_i log S_i (prediction-error decomposition)."""
        return float(np.sum(np.log(self._innov_var)))

    def whiten(self, values: np.ndarray) -> np.ndarray:
        """W^-1 V: standardized innovations of each column, in sorted-point order.

        Parameters
        ----------
        values : ndarray, shape (n,) or (n, k)
            Data in the order of ``points`` as given.
        """
        v = np.asarray(values, dtype=float)
        if v.shape[:1] != (self.n,) or v.ndim > 2:
            raise StateSpaceError(
                f"values: expected shape ({self.n},) or ({self.n}, k), got {v.shape}"
            )
        data = np.ascontiguousarray(v.reshape(self.n, -1)[self._order])
        out = np.empty_like(data)
        _innovation_pass(self._trans, self._gain, self._innov_var, data, out)
        return out[:, 0] if v.ndim == 1 else out

    def loglik(self, y: np.ndarray, *, mean: str = "zero", reml: bool = False) -> float:
        """The (profile, or REML) log-likelihood only."""
        return self._fit(y, design_matrix(self._points, mean), reml=reml).loglik

    def _fit(self, y: np.ndarray, design: np.ndarray, *, reml: bool):
        wy = self.whiten(y)
        wf = self.whiten(design) if design.shape[1] else np.empty((self.n, 0))
        return gls_loglik(self.logdet(), wy, wf, design, reml=reml)

    def analytic_score(self, y: np.ndarray, design: np.ndarray, *, reml: bool = False
                       ) -> np.ndarray:
        """The score dL/dtheta from the Kalman filter's sensitivity equations.

        Module docstring, "Score": with e = W^-1 (y - F beta^) and its derivative de_j at
        fixed beta^ (the profile's envelope theorem), g_j = -1/2 sum_i dS_i/S_i - e'de_j,
        and for REML additionally -tr((G'G)^-1 G' dG_j) with G = W^-1 F. O(n m^3) per
        parameter.
        """
        kernel = self.kernel
        names = kernel.param_names
        ls = kernel.lengthscale[0]
        unit_theta = kernel.theta.copy()
        unit_theta[names.index("log_lengthscale")] = 0.0
        model = matern_state_space(kernel.with_theta(unit_theta))
        tau = np.concatenate([[0.0], self._gaps]) / ls
        trans, noise = discretize(model, tau)
        npar, n, m = len(names), tau.size, model.m
        kinds = np.empty(npar, dtype=np.int64)
        dpinf = np.zeros((npar, m, m))
        dr = np.zeros(npar)
        drift = model.nilpotent - model.lam * np.eye(m)
        growth = np.ascontiguousarray(model.noise_coefficients[0])  # q_c L L'
        for j, name in enumerate(names):
            if name == "log_variance":  # P_inf and Q scale with s2
                kinds[j] = SCALES_NOISE
                dpinf[j] = model.pinf
            elif name == "log_lengthscale":  # gaps tau = dt / l: d tau / d log l = -tau
                kinds[j] = SCALES_TIME
            elif name == "log_nugget":
                kinds[j] = NOISE_ONLY
                dr[j] = kernel.nugget
            else:  # pragma: no cover - the accepted kernels have only these parameters
                raise StateSpaceError(f"no analytic derivative for parameter {name!r}")
        data = np.ascontiguousarray(
            np.column_stack([np.asarray(y, dtype=float), design])[self._order])
        white = np.empty_like(data)
        dwhite = np.empty((npar,) + data.shape)
        dinnov = np.empty((npar, n))
        bad = _sensitivity_pass(trans, noise, tau, kinds, drift, growth, model.pinf, dpinf,
                                float(kernel.nugget), dr, data, white, dwhite, dinnov)
        if bad >= 0:
            raise StateSpaceError(f"singular: innovation variance <= 0 at sorted point {bad}; "
                                  "add a nugget")
        innov = self._innov_var
        fit = gls_loglik(self.logdet(), white[:, 0], white[:, 1:], design, reml=reml)
        grad = np.empty(npar)
        for j in range(npar):
            de = dwhite[j, :, 0] - dwhite[j, :, 1:] @ fit.beta
            grad[j] = -0.5 * float(np.sum(dinnov[j] / innov)) - float(fit.whitened_residual @ de)
            if reml and design.shape[1]:
                g = white[:, 1:]
                grad[j] -= float(np.trace(np.linalg.solve(g.T @ g, g.T @ dwhite[j, :, 1:])))
        return grad

    def evaluate(self, y: np.ndarray, *, mean: str = "zero", reml: bool = False,
                 score: bool = True, score_method: str = "analytic") -> ModelEvaluation:
        """Exact log-likelihood and, optionally, the score.

        ``score_method="analytic"`` (default): the Kalman sensitivity equations
        (``analytic_score``), exact up to rounding. ``"finite_difference"``:
        Richardson-extrapolated central differences of the exact log-likelihood on the
        log scale, D(h) = (L(t + h) - L(t - h)) / (2h), g = (4 D(h) - D(2h)) / 3 with
        h = ``FD_STEP`` (truncation O(h^4)); its error estimate is max_i |g_i - D_i(h)|
        plus the rounding bound 1e-15 |L| / h, stated in ``notes``. Traces and Fisher
        information are not given.
        """
        if score_method not in ("analytic", "finite_difference"):
            raise StateSpaceError(f"score_method must be 'analytic' or 'finite_difference', "
                                  f"got {score_method!r}")
        y = np.asarray(y, dtype=float)
        if y.shape != (self.n,):
            raise StateSpaceError(f"y: expected shape ({self.n},), got {y.shape}")
        design = design_matrix(self._points, mean)
        t0 = time.perf_counter()
        fit = self._fit(y, design, reml=reml)
        seconds = {"loglik": time.perf_counter() - t0}
        notes = ["loglik: Kalman filter prediction-error decomposition (exact, O(n))"]
        grad = None
        if score and score_method == "analytic":
            t1 = time.perf_counter()
            grad = self.analytic_score(y, design, reml=reml)
            seconds["score"] = time.perf_counter() - t1
            notes.append("score: Kalman filter sensitivity equations (analytic, O(n))")
        elif score:
            t1 = time.perf_counter()
            theta = self.kernel.theta
            grad = np.empty(theta.size)
            err = 0.0
            for i in range(theta.size):
                vals = {}
                for mult in (-2, -1, 1, 2):
                    shifted = theta.copy()
                    shifted[i] += mult * FD_STEP
                    ref = self.with_kernel(self.kernel.with_theta(shifted))
                    vals[mult] = ref._fit(y, design, reml=reml).loglik
                d1 = (vals[1] - vals[-1]) / (2 * FD_STEP)
                d2 = (vals[2] - vals[-2]) / (4 * FD_STEP)
                grad[i] = (4 * d1 - d2) / 3
                err = max(err, abs(grad[i] - d1))
            err += 1e-15 * abs(fit.loglik) / FD_STEP
            seconds["score"] = time.perf_counter() - t1
            notes.append(
                f"score: Richardson-extrapolated central differences of the exact "
                f"log-likelihood, log-scale step h = {FD_STEP:g} and 2h; estimated "
                f"absolute error <= {err:.2e}"
            )
        return ModelEvaluation(
            source="statespace", n=self.n, param_names=self.kernel.param_names,
            loglik=fit.loglik, logdet=self.logdet(), quadratic=fit.quadratic, beta=fit.beta,
            score=grad, seconds=seconds, notes=tuple(notes),
        )
