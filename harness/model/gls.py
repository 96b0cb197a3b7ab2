"""Gaussian log-likelihood with a generalized-least-squares mean, from whitened data.

Every reference here can apply the inverse of a square root W of Sigma = W W'
(a Cholesky factor, a Kalman filter's innovations, a Kronecker eigenbasis). From the
whitened data u = W^-1 y and design G = W^-1 F the GLS estimate and profile likelihood
follow without Sigma itself:

    beta = argmin ||u - G beta||^2 = (F' Sigma^-1 F)^-1 F' Sigma^-1 y,
    Q = ||u - G beta||^2 = r' Sigma^-1 r,  r = y - F beta,
    L_ML   = -1/2 Q - 1/2 log det Sigma - n/2 log(2 pi),
    L_REML = -1/2 Q - 1/2 log det Sigma - 1/2 log det(F' Sigma^-1 F)
             + 1/2 log det(F' F) - (n - p)/2 log(2 pi).

The REML form is Harville (1974, Biometrika 61, eq. 5), whose +1/2 log det(F'F) term
makes it invariant to a reparameterization of the mean; with p = 0 both forms agree.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

LOG_2PI = float(np.log(2.0 * np.pi))


@dataclass(frozen=True)
class GlsFit:
    """Profile log-likelihood pieces from whitened data.

    Attributes
    ----------
    loglik : float
        L_ML or L_REML (see module docstring).
    quadratic : float
        Q = r' Sigma^-1 r after the mean model.
    beta : ndarray, shape (p,)
        GLS coefficients.
    beta_cov : ndarray, shape (p, p)
        (F' Sigma^-1 F)^-1, the GLS covariance of beta.
    whitened_residual : ndarray, shape (n,)
        W^-1 r.
    """

    loglik: float
    quadratic: float
    beta: np.ndarray
    beta_cov: np.ndarray
    whitened_residual: np.ndarray

    def to_dict(self) -> dict[str, object]:
        return {"loglik": self.loglik, "quadratic": self.quadratic,
                "beta": self.beta.tolist(), "beta_cov": self.beta_cov.tolist()}


def gls_loglik(logdet: float, whitened_y: np.ndarray, whitened_design: np.ndarray,
               design: np.ndarray, *, reml: bool = False) -> GlsFit:
    """Profile log-likelihood from u = W^-1 y, G = W^-1 F and F (see module docstring)."""
    u = np.asarray(whitened_y, dtype=float).ravel()
    g = np.asarray(whitened_design, dtype=float).reshape(u.size, -1)
    f = np.asarray(design, dtype=float).reshape(u.size, -1)
    n, p = g.shape
    if p:
        gram = g.T @ g
        try:
            chol = np.linalg.cholesky(gram)
        except np.linalg.LinAlgError:
            raise ValueError(
                "the mean model's design matrix is rank deficient (e.g. a linear trend "
                "along a coordinate that does not vary); choose a simpler mean model"
            ) from None
        beta = np.linalg.solve(gram, g.T @ u)
        beta_cov = np.linalg.inv(gram)
        resid = u - g @ beta
    else:
        chol = np.empty((0, 0))
        beta = np.empty(0)
        beta_cov = np.empty((0, 0))
        resid = u.copy()
    quadratic = float(resid @ resid)
    if reml and p:
        logdet_gram = 2.0 * float(np.sum(np.log(np.diag(chol))))
        logdet_ftf = float(np.linalg.slogdet(f.T @ f)[1])
        loglik = -0.5 * (quadratic + logdet + logdet_gram - logdet_ftf + (n - p) * LOG_2PI)
    else:
        loglik = -0.5 * (quadratic + logdet + n * LOG_2PI)
    return GlsFit(loglik=loglik, quadratic=quadratic, beta=beta, beta_cov=beta_cov,
                  whitened_residual=resid)
