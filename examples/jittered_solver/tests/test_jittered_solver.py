"""The jittered solver against numpy on Sigma + tol * s2 * I (built here)."""

import numpy as np
import pytest

from jittered_solver import factorize


class ToyKernel:
    """A squared-exponential kernel with covaudit's kernel interface (what we use of it)."""

    def __init__(self, variance, lengthscale):
        self.variance, self.lengthscale = variance, lengthscale

    def with_theta(self, theta):
        return ToyKernel(*np.exp(theta))

    def covariance(self, points):
        d2 = ((points[:, None] - points[None]) ** 2).sum(-1)
        return self.variance * np.exp(-0.5 * d2 / self.lengthscale**2) + 1e-6 * np.eye(len(points))


def test_members_match_numpy():
    rng = np.random.default_rng(0)
    x = rng.uniform(size=(60, 2))
    kernel = ToyKernel(2.0, 0.3)
    theta = np.log([2.0, 0.3])
    fac = factorize(x, kernel, theta, tol=1e-3)
    sigma = kernel.covariance(x) + 1e-3 * 2.0 * np.eye(60)
    b = rng.standard_normal((60, 3))
    assert fac.n == 60 and fac.nbytes > 0
    assert fac.logdet() == pytest.approx(np.linalg.slogdet(sigma)[1], rel=1e-12)
    np.testing.assert_allclose(fac.solve(b), np.linalg.solve(sigma, b), rtol=1e-8)
    np.testing.assert_allclose(fac.matvec(b), sigma @ b, rtol=1e-12)
    np.testing.assert_allclose(fac.apply_sqrt(fac.solve_sqrt(b)), b, rtol=1e-8, atol=1e-10)
    w = fac.apply_sqrt(np.eye(60))
    np.testing.assert_allclose(w @ w.T, sigma, rtol=1e-10, atol=1e-12)


def test_bad_tolerance_refused():
    with pytest.raises(ValueError, match="tol"):
        factorize(np.zeros((3, 1)), ToyKernel(1.0, 1.0), np.zeros(2), tol=-1.0)
