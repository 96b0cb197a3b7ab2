"""Exact tiled products against dense assembly, numpy and finite differences.

Sources: the dense reference values are ``Kernel.covariance`` / ``block_with_derivatives``
(themselves checked against scikit-learn in tests/test_kernels.py) multiplied by numpy;
derivatives against central finite differences in theta (common practice); the
round-robin schedule against the definition of a tournament schedule (every pair once,
every tile once per round).
"""

from __future__ import annotations

import numba
import numpy as np
import pytest

from harness.model.kernels import (
    KERNEL_CLASSES,
    Exponential,
    Matern,
    Matern32,
    Matern52,
    RationalQuadratic,
)
from harness.references.operator import KernelOperator, ProductMemoryError
from harness.references.operator.schedule import column_chunk, plan_tiles, round_robin

SHAPES = {Matern: {"nu": 0.8}, RationalQuadratic: {"alpha": 1.7}}


def build(cls, lengthscale, nugget):
    return cls(1.3, lengthscale, nugget, **SHAPES.get(cls, {}))


@pytest.fixture(scope="module")
def problem():
    rng = np.random.default_rng(11)
    return rng.random((700, 2)), rng.standard_normal((700, 3))


@pytest.mark.parametrize("m", range(1, 12))
def test_round_robin_every_pair_once_every_tile_once_per_round(m):
    # Source: definition of a round-robin schedule (each pair of m tiles met once).
    rounds = round_robin(m)
    seen = []
    for first, second in rounds:
        tiles = np.concatenate([first, second[first != second]])
        assert np.array_equal(np.sort(tiles), np.arange(m))
        seen += list(zip(first.tolist(), second.tolist(), strict=True))
    assert sorted(seen) == [(i, j) for i in range(m) for j in range(i, m)]


@pytest.mark.parametrize("cls", KERNEL_CLASSES)
@pytest.mark.parametrize("lengthscale", [(0.15,), (0.1, 0.3)], ids=["iso", "aniso"])
@pytest.mark.parametrize("nugget", [0.0, 0.02], ids=["no-nugget", "nugget"])
def test_products_equal_dense_assembly(problem, cls, lengthscale, nugget):
    # Source: Kernel.covariance (dense fill) @ B with numpy.
    x, b = problem
    kernel = build(cls, lengthscale, nugget)
    op = KernelOperator(x, kernel, tile=128)
    dense = kernel.covariance(x)
    expected = dense @ b
    np.testing.assert_allclose(op.matvec(b), expected, rtol=0, atol=1e-12 * abs(expected).max())
    idx = np.arange(x.shape[0])
    _, derivs = kernel.block_with_derivatives(x, idx, idx)
    got = op.derivative_matvecs(b)
    for i in range(kernel.n_params):
        want = derivs[i] @ b
        scale = max(abs(want).max(), 1e-300)
        np.testing.assert_allclose(got[i], want, rtol=0, atol=1e-12 * scale)
        np.testing.assert_allclose(op.derivative_matvec(i, b), got[i], rtol=0,
                                   atol=1e-13 * scale)


@pytest.mark.parametrize("cls", [Matern32, RationalQuadratic, Matern])
def test_derivative_products_match_finite_differences(problem, cls):
    # Source: central differences (Sigma(theta + h e_i) - Sigma(theta - h e_i)) B / 2h.
    x, b = problem
    kernel = build(cls, (0.12, 0.25), 0.03)
    op = KernelOperator(x, kernel)
    got = op.derivative_matvecs(b)
    h = 1e-5
    for i in range(kernel.n_params):
        step = np.zeros(kernel.n_params)
        step[i] = h
        plus = kernel.with_theta(kernel.theta + step).covariance(x) @ b
        minus = kernel.with_theta(kernel.theta - step).covariance(x) @ b
        fd = (plus - minus) / (2 * h)
        np.testing.assert_allclose(got[i], fd, rtol=0, atol=1e-6 * abs(fd).max())


def test_thread_count_does_not_change_a_bit(problem):
    # Fixed summation order: numba threads 1 vs 2 give bitwise equal products.
    x, b = problem
    op = KernelOperator(x, Matern52(1.0, (0.1, 0.2), 0.01), tile=64)
    before = numba.get_num_threads()
    try:
        numba.set_num_threads(1)
        one = op.matvec(b), op.derivative_matvecs(b)
        numba.set_num_threads(min(2, numba.config.NUMBA_NUM_THREADS))
        two = op.matvec(b), op.derivative_matvecs(b)
    finally:
        numba.set_num_threads(before)
    assert np.array_equal(one[0], two[0]) and np.array_equal(one[1], two[1])


def test_fortran_order_non_contiguous_and_vector_inputs(problem):
    x, b = problem
    kernel = Exponential(1.0, 0.2, 0.05)
    op = KernelOperator(x, kernel, tile=100)
    expected = kernel.covariance(x) @ b
    tol = 1e-12 * abs(expected).max()
    np.testing.assert_allclose(op.matvec(np.asfortranarray(b)), expected, rtol=0, atol=tol)
    wide = np.repeat(b, 2, axis=1)[:, ::2]                 # non-contiguous view
    assert not wide.flags.c_contiguous and not wide.flags.f_contiguous
    np.testing.assert_allclose(op.matvec(wide), expected, rtol=0, atol=tol)
    vec = op.matvec(b[:, 0])                               # k = 1 as a vector
    assert vec.shape == (x.shape[0],)
    np.testing.assert_allclose(vec, expected[:, 0], rtol=0, atol=tol)
    assert op.derivative_matvecs(b[:, 0]).shape == (kernel.n_params, x.shape[0])


def test_single_point():
    # n = 1: Sigma = s2 + tau2 (closed form).
    kernel = Matern32(2.0, 0.3, 0.5)
    op = KernelOperator(np.array([[0.2, 0.4]]), kernel)
    assert op.matvec(np.array([3.0]))[0] == pytest.approx(3.0 * 2.5, rel=1e-15)
    np.testing.assert_allclose(op.derivative_matvecs(np.array([1.0]))[:, 0],
                               [2.0, 0.0, 0.5], atol=1e-15)


def test_one_dimensional_points_and_three_dimensions():
    rng = np.random.default_rng(3)
    for x in (rng.random(300), rng.random((300, 3))):
        kernel = Matern52(1.0, 0.2, 0.01)
        b = rng.standard_normal(300)
        want = kernel.covariance(x) @ b
        np.testing.assert_allclose(KernelOperator(x, kernel, tile=64).matvec(b), want,
                                   rtol=0, atol=1e-12 * abs(want).max())


def test_memory_guard_chunks_columns_and_refuses_too_small_budgets(problem):
    x, b = problem
    kernel = Matern32(1.0, 0.2, 0.01)
    n, tile = x.shape[0], 128
    threads = numba.get_num_threads()
    one_column = 8 * tile * tile * threads + 8 * n * 2 + 8 * 2 * tile * threads
    assert column_chunk(n, 3, outputs=1, tile=tile, threads=threads,
                        memory_budget=one_column) == 1
    small = KernelOperator(x, kernel, tile=tile, memory_budget=one_column)
    full = KernelOperator(x, kernel, tile=tile)
    want = full.matvec(b)
    np.testing.assert_allclose(small.matvec(b), want, rtol=0, atol=1e-13 * abs(want).max())
    with pytest.raises(ProductMemoryError, match="memory budget"):
        KernelOperator(x, kernel, tile=tile, memory_budget=one_column // 2).matvec(b)


def test_bad_inputs_are_refused(problem):
    x, b = problem
    op = KernelOperator(x, Matern32(1.0, 0.2, 0.01))
    with pytest.raises(ValueError, match="expected shape"):
        op.matvec(b[:-1])
    with pytest.raises(IndexError, match="out of range"):
        op.derivative_matvec(7, b)
    with pytest.raises(ValueError, match="finite"):
        KernelOperator(np.array([[0.0, np.nan]]), Matern32(1.0, 0.2, 0.0))
    assert plan_tiles(5, tile=512).n_tiles == 1


@pytest.mark.parametrize("family", [0, 1, 2, 3])
@pytest.mark.parametrize("mode", [0, 1, 2, 3])
def test_vectorized_tiles_equal_the_row_routines_to_a_few_ulp(family, mode):
    # Source: harness.model.kernels.rows.fill_block (libm exp); spread from 0 to beyond
    # the 708 cutoff of the vectorized exponential (those entries are < 1e-300).
    from harness.model.kernels.rows import fill_block
    from harness.references.operator.tile_entries import fill_tile

    rng = np.random.default_rng(family * 4 + mode)
    xs = rng.random((70, 2)) * 10.0 ** rng.uniform(-3, 3, (70, 1))
    ys = np.vstack([xs[:5], rng.random((60, 2)) * 900])
    want = np.empty((70, 65))
    got = np.empty((70, 65))
    fill_block(family, xs, ys, 0.0, 1.7, mode, want)
    fill_tile(family, xs, ys, 0.0, 1.7, mode, got)
    np.testing.assert_allclose(got, want, rtol=4e-15, atol=1e-290)


def test_progress_bar_on_request_and_silent_otherwise(problem, capsys):
    x, b = problem
    kernel = Matern32(1.0, 0.2, 0.01)
    want = KernelOperator(x, kernel, tile=100, progress=False).matvec(b)
    assert capsys.readouterr().err == ""
    got = KernelOperator(x, kernel, tile=100, progress=True).matvec(b)
    err = capsys.readouterr().err
    assert "exact product" in err and "round" in err
    assert np.array_equal(got, want)
    KernelOperator(x, kernel, tile=100).matvec(b)      # None: stderr is not a terminal here
    assert capsys.readouterr().err == ""
