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


@pytest.mark.parametrize("cls", KERNEL_CLASSES)
def test_threaded_fills_do_not_depend_on_the_thread_count(cls):
    # The compiled fills split their columns over numba.get_num_threads() threads, each
    # writing its own columns: 1 and 2 threads give the same bits. 600 points is above the
    # size below which a fill stays on the calling thread.
    import numba

    pts = np.random.default_rng(6).random((600, 2))
    kernel = build(cls)
    rows, cols = np.arange(600), np.arange(0, 600, 2)
    before = numba.get_num_threads()
    results = []
    try:
        for threads in (1, min(2, numba.config.NUMBA_NUM_THREADS)):
            numba.set_num_threads(threads)
            results.append((assemble_lower(kernel, pts), kernel.covariance(pts),
                            kernel.block_with_derivatives(pts, rows, cols)))
    finally:
        numba.set_num_threads(before)
    (lower1, full1, (block1, derivs1)), (lower2, full2, (block2, derivs2)) = results
    np.testing.assert_array_equal(np.tril(lower1), np.tril(lower2))
    np.testing.assert_array_equal(full1, full2)
    np.testing.assert_array_equal(block1, block2)
    np.testing.assert_array_equal(derivs1, derivs2)


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


# -- issue 12: Matern with large nu is evaluated stably or refused ---------------------

from hypothesis import given, settings  # noqa: E402
from hypothesis import strategies as st  # noqa: E402
from scipy import integrate, optimize  # noqa: E402

from harness.model.kernels import radial  # noqa: E402


def _log_kv_by_quadrature(v: float, a: float) -> float:
    """log K_v(a) from the integral K_v(a) = int_0^inf exp(-a cosh t) cosh(v t) dt
    (NIST DLMF 10.32.9), integrated around the peak of the integrand in log space: an
    independent reference that neither overflows nor underflows at large order."""
    v = abs(v)

    def log_f(t):
        return -a * np.cosh(t) + v * t + np.log1p(np.exp(-2.0 * v * t)) - np.log(2.0)

    def slope(t):
        return -a * np.sinh(t) + v * np.tanh(v * t)

    tiny = 1e-9 / max(v, 1.0)
    peak = 0.0
    if v > 0 and slope(tiny) > 0:
        hi = 1.0
        while slope(hi) > 0:
            hi *= 2.0
        peak = optimize.brentq(slope, tiny, hi, xtol=1e-15, rtol=1e-15)
    top = log_f(peak)
    width = 1.0 / np.sqrt(a * np.cosh(peak))
    lo, hi = max(0.0, peak - 60 * width), peak + 60 * width

    def f(t):
        return np.exp(log_f(t) - top)

    inner = integrate.quad(f, lo, hi, points=[peak] if lo < peak < hi else None,
                           limit=500, epsabs=0, epsrel=1e-13)[0]
    outer = integrate.quad(f, hi, np.inf, limit=200, epsabs=0, epsrel=1e-10)[0]
    return top + np.log(inner + outer)


def _matern_direct(r, nu):
    """rho and s from scipy.special.kv in the plain form (R&W eq. 4.14, DLMF 10.29.4)."""
    a = np.sqrt(2 * nu) * r
    c = 2.0 ** (1 - nu) / special.gamma(nu)
    return c * a ** nu * special.kv(nu, a), c * a ** (nu + 1) * special.kv(nu - 1, a)


@settings(max_examples=150, deadline=None)
@given(nu=st.floats(0.05, 45.0), r=st.floats(1e-3, 30.0))
def test_matern_general_equals_scipy_kv_where_kv_is_finite(nu, r):
    # Source: scipy.special.kv and gamma in the textbook form (R&W eq. 4.14).
    with np.errstate(all="ignore"):
        rho_ref, s_ref = _matern_direct(r, nu)
    rho, s = radial.matern_general(np.array([r]), nu)
    for value, ref in ((rho[0], rho_ref), (s[0], s_ref)):
        if np.isfinite(ref) and ref > 1e-280 and np.isfinite(special.gamma(nu)):
            assert value == pytest.approx(ref, rel=1e-9, abs=1e-300)


@settings(max_examples=40, deadline=None)
@given(nu=st.floats(0.3, 1e4), r=st.floats(1e-4, 8.0))
def test_matern_general_equals_the_bessel_integral_at_any_order(nu, r):
    # Source: DLMF 10.32.9 (integral representation of K_nu) by scipy.integrate.quad;
    # covers orders where scipy.special.kv overflows (nu = 300 at small r, issue 12).
    a = np.sqrt(2 * nu) * r
    log_c = (1 - nu) * np.log(2.0) - special.gammaln(nu)
    rho_ref = np.exp(log_c + nu * np.log(a) + _log_kv_by_quadrature(nu, a))
    s_ref = np.exp(log_c + (nu + 1) * np.log(a) + _log_kv_by_quadrature(nu - 1, a))
    rho, s = radial.matern_general(np.array([r]), nu)
    # The reference itself cancels about nu * 1e-16 in log space.
    rel = 1e-9 + 4e-16 * nu
    assert rho[0] == pytest.approx(rho_ref, rel=rel, abs=1e-300)
    assert s[0] == pytest.approx(s_ref, rel=rel, abs=1e-300)


@settings(max_examples=100, deadline=None)
@given(nu=st.floats(1e3, radial.MATERN_NU_MAX), r=st.floats(0.0, 6.0),
       lengthscale=st.floats(0.01, 100.0))
def test_large_nu_tends_to_the_gaussian_limit(nu, r, lengthscale):
    # Source: Matern -> squared exponential as nu -> infinity (R&W section 4.2.1, p. 85);
    # the gap is O(r^4 / nu) (from the large-order expansion, DLMF 10.41.4).
    kernel = Matern(1.0, (lengthscale,), 0.0, nu=nu)
    points = np.array([[0.0], [r * lengthscale]])
    value = kernel.covariance(points)[0, 1]
    gauss = np.exp(-0.5 * r * r)
    assert np.isfinite(value) and value > 0 or gauss < 1e-300
    assert abs(np.log(max(value, 1e-300)) + 0.5 * r * r) <= (r ** 2 + r ** 4) / nu + 1e-12


def test_nu_1e6_no_longer_collapses_to_the_identity():
    # Defect 3: at nu = 1e6 the old kv-based form underflowed to 0 off the diagonal.
    kernel = Matern(1.0, (0.2,), 1e-3, nu=1e6)
    sigma = kernel.covariance(np.array([[0.0, 0.0], [0.1, 0.0], [0.0, 0.3]]))
    gauss = Gaussian(1.0, (0.2,), 1e-3).covariance(np.array([[0.0, 0.0], [0.1, 0.0],
                                                             [0.0, 0.3]]))
    np.testing.assert_allclose(sigma, gauss, rtol=1e-5)


def test_nu_300_factorizes_without_a_nugget_complaint():
    # Defect 3: at nu = 300 kv overflowed, the matrix became NaN/0 and the Cholesky error
    # said "add or increase the nugget", naming the wrong cause. Source of the check:
    # numpy.linalg.cholesky succeeds on the correct (positive definite) matrix.
    pts = np.random.default_rng(3).random((80, 2))
    sigma = Matern(1.0, (0.2,), 1e-3, nu=300.0).covariance(pts)
    assert np.all(np.isfinite(sigma))
    np.linalg.cholesky(sigma)
    np.testing.assert_allclose(sigma, Gaussian(1.0, (0.2,), 1e-3).covariance(pts),
                               atol=5e-3)


def test_order_switch_is_continuous():
    # Source: continuity of K_nu in nu (DLMF 10.25.2); both sides of LARGE_ORDER agree.
    r = np.linspace(1e-3, 6.0, 200)
    below = radial.matern_general(r, radial.LARGE_ORDER * (1 - 1e-12))
    above = radial.matern_general(r, radial.LARGE_ORDER)
    for x, y in zip(below, above, strict=True):
        np.testing.assert_allclose(x, y, rtol=1e-9, atol=1e-300)


@pytest.mark.parametrize("nu", [60.0, 3e3, 1e6])
def test_large_nu_slope_is_minus_r_drho_dr(nu):
    # Source: s(r) = -r d rho / d r (module definition), central differences.
    r = np.array([0.2, 0.7, 1.5, 3.0])
    h = 1e-6
    up, _ = radial.matern_general(r + h, nu)
    down, _ = radial.matern_general(r - h, nu)
    _, s = radial.matern_general(r, nu)
    np.testing.assert_allclose(s, -r * (up - down) / (2 * h), rtol=1e-6)


@pytest.mark.parametrize("nu", [1e9, float("inf"), 0.0, -1.0])
def test_nu_outside_the_evaluated_range_is_refused(nu):
    with pytest.raises(KernelParameterError, match="nu"):
        make_kernel("matern", {"variance": 1.0, "lengthscale": 0.2, "nu": nu})
    with pytest.raises(ValueError, match="outside the evaluated range|gaussian"):
        radial.matern_general(np.array([0.5]), nu)
