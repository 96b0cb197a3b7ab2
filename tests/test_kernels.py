"""Kernels against scikit-learn, finite differences and the Bessel-function form.

Every family in ``KERNEL_CLASSES`` is checked: adding a kernel there adds it here.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import special
from sklearn.gaussian_process import kernels as sk

from harness.model.kernels import (
    KERNEL_CLASSES,
    Exponential,
    Gaussian,
    KernelParameterError,
    Matern,
    Matern32,
    Matern52,
    RationalQuadratic,
    UnknownKernelError,
    assemble_lower,
    make_kernel,
)

SHAPES = {Matern: {"nu": 0.8}, RationalQuadratic: {"alpha": 1.7}}


def build(cls, *, variance=1.3, lengthscale=(0.2,), nugget=0.05):
    return cls(variance, lengthscale, nugget, **SHAPES.get(cls, {}))


def sklearn_kernel(kernel):
    """The same covariance in scikit-learn's kernel algebra (log-scale theta too)."""
    ls = list(kernel.lengthscale) if not kernel.isotropic else kernel.lengthscale[0]
    family = kernel.family
    if family in ("exponential", "matern32", "matern52", "matern"):
        nu = {"exponential": 0.5, "matern32": 1.5, "matern52": 2.5}.get(family, kernel.shape_value)
        corr = sk.Matern(length_scale=ls, nu=nu)
    elif family == "gaussian":
        corr = sk.RBF(length_scale=ls)
    else:
        corr = sk.RationalQuadratic(length_scale=ls, alpha=kernel.shape_value)
    out = sk.ConstantKernel(kernel.variance) * corr
    if kernel.has_nugget:
        out = out + sk.WhiteKernel(kernel.nugget)
    return out


@pytest.fixture(scope="module")
def points_2d():
    return np.random.default_rng(7).random((60, 2))


@pytest.mark.parametrize("cls", KERNEL_CLASSES)
@pytest.mark.parametrize("lengthscale", [(0.2,), (0.15, 0.4)])
def test_values_and_gradients_equal_sklearn(cls, lengthscale, points_2d):
    # Source: scikit-learn's kernels (Matern, RBF, RationalQuadratic, ConstantKernel,
    # WhiteKernel); their K_gradient is with respect to the log-scale hyperparameters.
    if cls is RationalQuadratic and len(lengthscale) > 1:
        pytest.skip("scikit-learn's RationalQuadratic is isotropic only")
    kernel = build(cls, lengthscale=lengthscale)
    reference = sklearn_kernel(kernel)
    k_ref, grad_ref = reference(points_2d, eval_gradient=True)
    idx = np.arange(points_2d.shape[0])
    value, derivs = kernel.block_with_derivatives(points_2d, idx, idx)
    np.testing.assert_allclose(value, k_ref, rtol=1e-12, atol=1e-15)
    # sklearn's theta order: constant, length scale(s), [alpha], white noise
    names = [h.name for h in reference.hyperparameters]
    columns = {name: k for k, name in enumerate(names)}
    ls_key = next(n for n in names if n.endswith("length_scale"))
    ls_start = sum(reference.hyperparameters[j].n_elements
                   for j in range(names.index(ls_key)))
    expected = [grad_ref[..., 0]]
    expected += [grad_ref[..., ls_start + k] for k in range(len(lengthscale))]
    if kernel.has_nugget:
        white_pos = sum(h.n_elements for h in reference.hyperparameters[:columns[names[-1]]])
        expected.append(grad_ref[..., white_pos])
    # scikit-learn differentiates the general-nu Matern numerically (forward differences
    # in its Matern.__call__), so its length-scale gradient is only good to ~1e-4 there;
    # ours is analytic and checked against central differences below.
    rtol, atol = (1e-3, 2e-5) if cls is Matern else (1e-10, 1e-13)
    for i, exp in enumerate(expected):
        np.testing.assert_allclose(derivs[i], exp, rtol=rtol, atol=atol,
                                   err_msg=kernel.param_names[i])


@pytest.mark.parametrize("cls", KERNEL_CLASSES)
def test_derivatives_equal_central_differences(cls):
    # Central difference on the log scale, step h = 1e-5: truncation O(h^2) ~ 1e-10 of
    # the second derivative, rounding ~ eps / h ~ 1e-11 (common practice).
    rng = np.random.default_rng(3)
    pts = rng.random((25, 3))
    kernel = build(cls, lengthscale=(0.3, 0.5, 0.7))
    rows, cols = np.arange(25), np.arange(25)
    _, derivs = kernel.block_with_derivatives(pts, rows, cols)
    h = 1e-5
    for i in range(kernel.n_params):
        step = np.zeros(kernel.n_params)
        step[i] = h
        plus = kernel.with_theta(kernel.theta + step).block(pts, rows, cols)
        minus = kernel.with_theta(kernel.theta - step).block(pts, rows, cols)
        np.testing.assert_allclose(derivs[i], (plus - minus) / (2 * h), rtol=1e-6, atol=1e-9)


@pytest.mark.parametrize("nu, closed", [(0.5, Exponential), (1.5, Matern32), (2.5, Matern52)])
def test_half_integer_matern_equals_bessel_form(nu, closed, points_2d):
    # NIST DLMF 10.39.2: K_{1/2}(z) = sqrt(pi / (2 z)) e^-z, so the Bessel form at
    # nu = 1/2 is exp(-r); nu = 3/2, 5/2 follow from the recurrence DLMF 10.29.1.
    bessel = Matern(1.0, 0.3, nu=nu).covariance(points_2d)
    np.testing.assert_allclose(closed(1.0, 0.3).covariance(points_2d), bessel, rtol=1e-12)


def test_dlmf_k_half_closed_form():
    # NIST DLMF 10.39.2 directly against scipy.special.kv.
    z = np.linspace(0.01, 20, 50)
    np.testing.assert_allclose(special.kv(0.5, z), np.sqrt(np.pi / (2 * z)) * np.exp(-z),
                               rtol=1e-13)


def test_general_matern_limit_at_zero_distance():
    # rho(0) = 1 for every Matern (R&W 2006 eq. 4.14 limit); the Bessel form is 0 * inf
    # there and must be set explicitly.
    pts = np.array([[0.1, 0.2], [0.1, 0.2], [0.5, 0.5]])
    k = Matern(2.0, 0.3, nu=0.8).cross_covariance(pts, pts)
    assert k[0, 1] == pytest.approx(2.0)
    _, d = Matern(2.0, 0.3, nu=0.8).block_with_derivatives(pts, np.arange(3), np.arange(3))
    assert d[1, 0, 1] == 0.0


def test_nugget_only_on_same_observation():
    # Duplicate coordinates are distinct observations: the nugget goes on i == j only.
    pts = np.array([[0.0, 0.0], [0.0, 0.0]])
    k = Matern32(1.0, 0.1, 0.5).covariance(pts)
    np.testing.assert_allclose(k, [[1.5, 1.0], [1.0, 1.5]])
    # Off-diagonal block between disjoint index sets carries no nugget.
    kb = Matern32(1.0, 0.1, 0.5).block(np.vstack([pts, pts]), np.array([0, 1]),
                                       np.array([1, 2]))
    np.testing.assert_allclose(kb, [[1.0, 1.0], [1.5, 1.0]])


@pytest.mark.parametrize("cls", KERNEL_CLASSES)
def test_lower_assembly_equals_block(cls):
    pts = np.random.default_rng(5).random((300, 2))
    kernel = build(cls)
    lower = np.tril(assemble_lower(kernel, pts))
    full = kernel.covariance(pts)
    np.testing.assert_allclose(lower, np.tril(full), rtol=1e-13, atol=1e-15)


def test_theta_round_trip_and_names():
    k = Matern52(2.0, (0.1, 0.2), 0.01)
    assert k.param_names == ("log_variance", "log_lengthscale_1", "log_lengthscale_2",
                             "log_nugget")
    np.testing.assert_allclose(k.theta, np.log([2.0, 0.1, 0.2, 0.01]))
    back = k.with_theta(k.theta)
    np.testing.assert_allclose(back.theta, k.theta, rtol=1e-15)
    assert back.param_names == k.param_names
    assert Gaussian(1.0, 0.3).param_names == ("log_variance", "log_lengthscale")


@pytest.mark.parametrize("params, message", [
    ({"variance": -1.0, "lengthscale": 0.1}, "variance must be"),
    ({"variance": 1.0, "lengthscale": 0.0}, "lengthscale must be"),
    ({"variance": 1.0, "lengthscale": [0.1, -2.0]}, r"lengthscale\[2\]"),
    ({"variance": 1.0, "lengthscale": 0.1, "nugget": float("nan")}, "nugget must be"),
    ({"variance": 1.0}, "'lengthscale' is required"),
    ({"lengthscale": 0.1, "nu": 1.5}, "does not take"),
])
def test_bad_parameters_are_named(params, message):
    with pytest.raises(KernelParameterError, match=message):
        make_kernel("matern32", params)


def test_unknown_kernel_lists_known_ones():
    with pytest.raises(UnknownKernelError, match="known kernels: exponential, matern32"):
        make_kernel("matern33", {"lengthscale": 0.1})


def test_anisotropic_dimension_mismatch():
    with pytest.raises(KernelParameterError, match="2 values given for 3-dimensional"):
        Matern32(1.0, (0.1, 0.2)).covariance(np.zeros((4, 3)))
