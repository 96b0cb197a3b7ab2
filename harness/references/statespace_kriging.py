"""Exact kriging on a line by the Rauch-Tung-Striebel smoother, O((n + m) s^3) time.

For the half-integer Matern state-space model of ``harness.references.statespace``
(state dimension s = nu + 1/2), the kriging mean and latent variance at new points x*
are the smoothed mean and variance of f(x*) given the observations: run the Kalman
filter over the union of observed and new locations, sorted, with the new points as
missing observations (prediction step only), then the RTS backward pass (Sarkka 2013,
*Bayesian Filtering and Smoothing*, Theorem 8.2; Hartikainen and Sarkka 2010 for the
Matern models):

    G_k   = P_k A_{k+1}' (P-_{k+1})^-1,
    m^s_k = m_k + G_k (m^s_{k+1} - m-_{k+1}),
    P^s_k = P_k + G_k (P^s_{k+1} - P-_{k+1}) G_k'.

The smoothed mean of data column c is k*' Sigma^-1 c and the smoothed variance
s2 - k*' Sigma^-1 k* (the simple-kriging formulas, Rasmussen and Williams 2006, eqs.
2.25-2.26), both exact up to rounding. The filter's gains do not depend on the data, so
one pass smooths y and every column of the design F at once; universal kriging then
follows from them (Cressie 1993, eqs. 3.4.60-3.4.61):

    m* = f*' beta + S_y - S_F beta,     v* = v_s + u' (F' Sigma^-1 F)^-1 u,
    u = f* - S_F',

with S_c the smoothed means of column c, beta and (F' Sigma^-1 F)^-1 the GLS fit of the
Kalman filter (``StateSpaceReference``). (P-_{k+1})^-1 is applied as a pseudo-inverse,
so that a new point at an observed location of a noise-free model (a singular
prediction covariance) still smooths correctly.
"""

from __future__ import annotations

from dataclasses import dataclass

import numba
import numpy as np

from harness.model.gls import gls_loglik
from harness.model.kernels.classes import Kernel
from harness.model.mean import design_matrix
from harness.references.statespace import (
    StateSpaceError,
    StateSpaceReference,
    discretize,
    matern_state_space,
)


@dataclass(frozen=True)
class SmootherKriging:
    """Kriging at new points by the RTS smoother.

    Attributes
    ----------
    mean : ndarray, shape (m,)
        Universal-kriging mean.
    variance : ndarray, shape (m,)
        Latent predictive variance (clipped at 0).
    beta : ndarray
        GLS mean coefficients.
    """

    mean: np.ndarray
    variance: np.ndarray
    beta: np.ndarray

    def to_dict(self) -> dict[str, object]:
        return {"mean": self.mean.tolist(), "variance": self.variance.tolist(),
                "beta": self.beta.tolist()}


@numba.njit(cache=True)
def _filter_smoother(trans, noise, pinf, tau2, observed, data, out_mean, out_var
                     ):  # pragma: no cover - compiled
    """RTS smoother over sorted locations (module docstring); ``observed[i]`` False is a
    missing observation. Fills the smoothed f-mean of each data column and the smoothed
    f-variance at every location; returns -1, or the first index with S_i <= 0."""
    n, ncol = data.shape
    s = pinf.shape[0]
    mf = np.zeros((n, s, ncol))
    mp = np.zeros((n, s, ncol))
    pf = np.empty((n, s, s))
    pp = np.empty((n, s, s))
    for i in range(n):
        if i == 0:
            pp[0] = pinf
        else:
            pp[i] = trans[i] @ pf[i - 1] @ trans[i].T + noise[i]
            mp[i] = trans[i] @ mf[i - 1]
        if observed[i]:
            sv = pp[i, 0, 0] + tau2
            if not sv > 0.0:
                return i
            gain = pp[i, :, 0] / sv
            for c in range(ncol):
                v = data[i, c] - mp[i, 0, c]
                for r in range(s):
                    mf[i, r, c] = mp[i, r, c] + gain[r] * v
            for r in range(s):
                for q in range(s):
                    pf[i, r, q] = pp[i, r, q] - sv * gain[r] * gain[q]
        else:
            mf[i] = mp[i]
            pf[i] = pp[i]
    ms = mf[n - 1].copy()
    ps = pf[n - 1].copy()
    out_mean[n - 1] = ms[0]
    out_var[n - 1] = ps[0, 0]
    for i in range(n - 2, -1, -1):
        gain_t = np.linalg.pinv(pp[i + 1]) @ (trans[i + 1] @ pf[i])   # G' (P, P- symmetric)
        g = gain_t.T
        ms = mf[i] + g @ (ms - mp[i + 1])
        ps = pf[i] + g @ (ps - pp[i + 1]) @ gain_t
        ps = 0.5 * (ps + ps.T)
        out_mean[i] = ms[0]
        out_var[i] = ps[0, 0]
    return -1


def _line(points: np.ndarray, what: str) -> np.ndarray:
    pts = np.asarray(points, dtype=float)
    if pts.ndim == 2 and pts.shape[1] == 1:
        pts = pts[:, 0]
    if pts.ndim != 1 or not np.all(np.isfinite(pts)):
        raise StateSpaceError(f"{what}: the smoother needs finite 1-dimensional points, "
                              f"shape (n,) or (n, 1); got shape {np.shape(points)}")
    return pts


def smoother_kriging(points: np.ndarray, y: np.ndarray, kernel: Kernel,
                     new_points: np.ndarray, *, mean: str = "zero") -> SmootherKriging:
    """Universal-kriging mean and latent variance at ``new_points`` from observations
    ``y`` at ``points`` on a line, by the RTS smoother (module docstring).

    Parameters
    ----------
    points : ndarray, shape (n,) or (n, 1)
    y : ndarray, shape (n,)
    kernel : Kernel
        Isotropic exponential, Matern 3/2 or Matern 5/2 (``matern_state_space``).
    new_points : ndarray, shape (m,) or (m, 1)
    mean : {"zero", "constant", "linear"}

    Raises
    ------
    StateSpaceError
        For points off a line, another kernel, or a singular model.
    """
    x = _line(points, "points")
    xs = _line(new_points, "new points")
    yv = np.asarray(y, dtype=float).ravel()
    if yv.shape != x.shape:
        raise StateSpaceError(f"y: expected {x.size} values, got {yv.size}")
    model = matern_state_space(kernel)
    design = design_matrix(x[:, None], mean)
    filt = StateSpaceReference(x, kernel)
    white_f = filt.whiten(design) if design.shape[1] else np.empty((x.size, 0))
    fit = gls_loglik(filt.logdet(), filt.whiten(yv), white_f, design)
    union = np.concatenate([x, xs])
    order = np.argsort(union, kind="stable")
    observed = np.concatenate([np.ones(x.size, bool), np.zeros(xs.size, bool)])[order]
    data = np.zeros((union.size, 1 + design.shape[1]))
    data[: x.size] = np.column_stack([yv, design])
    data = np.ascontiguousarray(data[order])
    dt = np.concatenate([[0.0], np.diff(union[order])])
    trans, noise = discretize(model, dt)
    smooth_mean = np.empty((union.size, data.shape[1]))
    smooth_var = np.empty(union.size)
    bad = _filter_smoother(trans, noise, model.pinf, float(kernel.nugget), observed, data,
                           smooth_mean, smooth_var)
    if bad >= 0:
        raise StateSpaceError(f"singular: innovation variance <= 0 at sorted point {bad}; "
                              "add a nugget")
    where = np.empty(union.size, dtype=np.intp)
    where[order] = np.arange(union.size)
    at = where[x.size:]
    s_y, s_f = smooth_mean[at, 0], smooth_mean[at, 1:]
    new_design = design_matrix(xs[:, None], mean)
    values = new_design @ fit.beta + s_y - s_f @ fit.beta
    variance = smooth_var[at]
    if design.shape[1]:
        u = new_design - s_f                                                # (m, q)
        variance = variance + np.einsum("mi,ij,mj->m", u, fit.beta_cov, u)
    return SmootherKriging(mean=values, variance=np.maximum(variance, 0.0), beta=fit.beta)
