"""Solver plugins: loading by spec and entry point, protocol checks, generic fallbacks.

Expected values: numpy/scipy on the perturbed dense matrix Sigma + tol * s2 * I that the
example plugin (examples/jittered_solver) factors, and central finite differences of
the dense covariance for the generic derivative products.
"""

from __future__ import annotations

import importlib.util
import sys
from pathlib import Path

import numpy as np
import pytest
import scipy.stats
from threadpoolctl import threadpool_limits

from harness._version import __version__
from harness.likelihood import evaluate_likelihood
from harness.model.kernels import Matern32
from harness.solvers.fallback import (
    AdaptedFactorization,
    SolverOutputError,
    SolverProtocolError,
    adapt,
)
from harness.solvers.plugins import SolverLoadError, load_factory
from harness.solvers.protocol import Factorization, SymmetricFactorization
from harness.solvers.registry import ResolvedSolver, SolverRuntimeError, resolve_solver

EXAMPLE = Path(__file__).resolve().parents[1] / "examples" / "jittered_solver"
KERNEL = Matern32(variance=1.4, lengthscale=0.3, nugget=0.05)


@pytest.fixture(autouse=True)
def _one_blas_thread():
    with threadpool_limits(1):
        yield


@pytest.fixture
def example_path(monkeypatch):
    monkeypatch.syspath_prepend(str(EXAMPLE))
    yield
    for name in [m for m in sys.modules if m.startswith("jittered_solver")]:
        del sys.modules[name]


@pytest.fixture(scope="module")
def data():
    rng = np.random.default_rng(4)
    points = rng.uniform(size=(80, 2))
    y = rng.standard_normal(80)
    return points, y


def test_example_plugin_by_spec_follows_protocol(example_path, data):
    # source: scipy.stats.multivariate_normal.logpdf of N(0, Sigma + tol s2 I)
    points, y = data
    solver = resolve_solver("jittered_solver:factorize")
    assert solver.origin == "module spec" and solver.version == "0.1.0"
    fac = solver.factorize(points, KERNEL, KERNEL.theta, tol=1e-4)
    assert isinstance(fac, AdaptedFactorization)
    assert isinstance(fac, Factorization) and isinstance(fac.inner, SymmetricFactorization)
    assert fac.supports_sqrt and any("derivative_matvec supplied" in n for n in fac.notes)
    sigma = KERNEL.covariance(points) + 1e-4 * KERNEL.variance * np.eye(80)
    result = evaluate_likelihood(fac, points, y, KERNEL)
    expected = scipy.stats.multivariate_normal(np.zeros(80), sigma).logpdf(y)
    assert result.loglik == pytest.approx(expected, rel=1e-10)
    assert result.notes[: len(fac.notes)] == fac.notes
    assert solver.to_dict()["factory"] == "jittered_solver.solver:factorize"


def test_generic_derivatives_match_finite_differences(example_path, data):
    # source: central differences (Sigma(theta + h e_i) - Sigma(theta - h e_i)) / 2h
    points, _ = data
    inner = load_factory("jittered_solver:factorize")(points, KERNEL, KERNEL.theta, tol=0.0)
    cached = adapt(inner, points, KERNEL)
    chunked = AdaptedFactorization(inner, points, KERNEL, cache_bytes=0)
    b = np.random.default_rng(0).standard_normal((80, 2))
    h = 1e-6
    for i in range(KERNEL.n_params):
        step = np.zeros(KERNEL.n_params)
        step[i] = h
        fd = (KERNEL.with_theta(KERNEL.theta + step).covariance(points)
              - KERNEL.with_theta(KERNEL.theta - step).covariance(points)) / (2 * h)
        np.testing.assert_allclose(cached.derivative_matvec(i, b), fd @ b, rtol=1e-6,
                                   atol=1e-8)
        np.testing.assert_allclose(chunked.derivative_matvec(i, b),
                                   cached.derivative_matvec(i, b), rtol=1e-12)
    with pytest.raises(SolverProtocolError, match="generic dense limit of 50"):
        AdaptedFactorization(inner, points, KERNEL, max_dense_n=50).derivative_matvec(0, b)


def test_entry_point_discovery(example_path, tmp_path, monkeypatch, data):
    # a distribution declaring [project.entry-points."covaudit.solvers"], as pip would
    info = tmp_path / "jittered_solver-0.1.0.dist-info"
    info.mkdir()
    (info / "METADATA").write_text("Metadata-Version: 2.1\nName: jittered-solver\n"
                                   "Version: 0.1.0\n")
    (info / "entry_points.txt").write_text(
        "[covaudit.solvers]\njittered = jittered_solver:factorize\n")
    monkeypatch.syspath_prepend(str(tmp_path))
    solver = resolve_solver("jittered")
    assert solver.version == "0.1.0" and "jittered-solver" in solver.origin
    fac = solver.factorize(data[0], KERNEL, tol=1e-6)
    assert fac.n == 80


def test_builtin_dense_solver(data):
    # source: numpy.linalg.slogdet of the dense covariance
    points, _ = data
    solver = resolve_solver("dense")
    assert (solver.origin, solver.version) == ("builtin", __version__)
    fac = solver.factorize(points, KERNEL, KERNEL.theta, tol=None)
    assert fac.logdet() == pytest.approx(np.linalg.slogdet(KERNEL.covariance(points))[1],
                                         rel=1e-12)
    assert fac.supports_sqrt and fac.notes == ()


def test_builtin_hodlr_resolves_or_says_unavailable():
    if importlib.util.find_spec("harness.solvers.hodlr") is None:
        with pytest.raises(SolverLoadError, match="built-in solver 'hodlr' is not available"):
            resolve_solver("hodlr")
    else:
        assert callable(resolve_solver("hodlr").factory)


@pytest.mark.parametrize("spec,message", [
    ("no_such_module_xyz:factorize", "module 'no_such_module_xyz' not found"),
    ("jittered_solver:nope", "has no attribute 'nope'"),
    ("jittered_solver:__version__", "is a str, not a callable"),
    ("justaname", "unknown solver 'justaname'; known solvers: dense, hodlr"),
    ("a:b:c", "not of the form 'package.module:factory'"),
])
def test_load_errors_quote_the_spec(example_path, spec, message):
    with pytest.raises(SolverLoadError, match=message) as info:
        resolve_solver(spec)
    assert spec in str(info.value)


def test_plugin_import_error_is_quoted(tmp_path, monkeypatch):
    (tmp_path / "broken_plugin_xyz.py").write_text("raise RuntimeError('no licence file')\n")
    monkeypatch.syspath_prepend(str(tmp_path))
    with pytest.raises(SolverLoadError, match="raised RuntimeError: no licence file"):
        load_factory("broken_plugin_xyz:factorize")


class _Minimal:
    """Required members only, from a dense matrix; ``poison`` breaks one of them."""

    def __init__(self, sigma, poison=None):
        self.sigma, self.poison, self.n, self.nbytes = sigma, poison, sigma.shape[0], 0

    def logdet(self):
        return float("nan") if self.poison == "logdet" else np.linalg.slogdet(self.sigma)[1]

    def solve(self, b):
        x = np.linalg.solve(self.sigma, b)
        if self.poison == "solve":
            x[0] = np.nan
        return x[:-1] if self.poison == "shape" else x

    def matvec(self, b):
        return self.sigma @ b


def _solver(factory):
    return ResolvedSolver(name="toy", version=None, factory=factory, origin="test")


def test_plugin_raising_nan_or_incomplete_gives_clear_errors(data):
    points, y = data
    sigma = KERNEL.covariance(points)

    def raising(points, kernel, theta, *, tol):
        raise np.linalg.LinAlgError("rank collapse at level 3")

    with pytest.raises(SolverRuntimeError, match="solver 'toy' .* raised LinAlgError.*"
                                                 "rank collapse at level 3"):
        _solver(raising).factorize(points, KERNEL, tol=1e-6)
    with pytest.raises(SolverOutputError, match=r"logdet\(\) returned nan"):
        _solver(lambda *a, tol: _Minimal(sigma, "logdet")).factorize(
            points, KERNEL, tol=1e-6).logdet()
    fac = _solver(lambda *a, tol: _Minimal(sigma, "solve")).factorize(points, KERNEL, tol=1)
    with pytest.raises(SolverOutputError, match="solve returned 1 non-finite"):
        evaluate_likelihood(fac, points, y, KERNEL)
    fac = _solver(lambda *a, tol: _Minimal(sigma, "shape")).factorize(points, KERNEL, tol=1)
    with pytest.raises(SolverOutputError, match=r"solve returned shape \(79,\)"):
        fac.solve(y)

    class NoSolve:
        n, nbytes = 80, 0

        def logdet(self):
            return 0.0

    with pytest.raises(SolverProtocolError, match="lacks required member.*solve, matvec"):
        _solver(lambda *a, tol: NoSolve()).factorize(points, KERNEL, tol=1e-6)


def test_minimal_plugin_gets_generic_members_and_matches_dense(data):
    # source: scipy.stats.multivariate_normal.logpdf and dense numpy traces
    points, y = data
    sigma = KERNEL.covariance(points)
    fac = _solver(lambda *a, tol: _Minimal(sigma)).factorize(points, KERNEL, tol=1e-6)
    assert not fac.supports_sqrt
    assert any("non-symmetric form" in note for note in fac.notes)
    result = evaluate_likelihood(fac, points, y, KERNEL, trace="hutchpp", probes=30, rng=0)
    assert result.loglik == pytest.approx(
        scipy.stats.multivariate_normal(np.zeros(80), sigma).logpdf(y), rel=1e-10)
    idx = np.arange(80)
    derivs = KERNEL.block_with_derivatives(points, idx, idx)[1]
    exact = np.array([np.trace(np.linalg.solve(sigma, d)) for d in derivs])
    assert np.all(np.abs(result.trace_terms - exact) < 5 * result.trace_stderr)

