"""The tiled dense Cholesky, inverse, solves and products (harness.linalg).

Outside checks: scipy.linalg.cho_factor / cho_solve / solve_triangular and numpy.linalg.inv
(LAPACK dpotrf, dpotrs, dtrtrs, dgetri in one call each). The bound on every BLAS operand
is checked on the calls recorded by ``harness.linalg.blas_calls.record_calls``.
"""

from __future__ import annotations

import os
import subprocess
import sys
import textwrap

import numpy as np
import pytest
import scipy.linalg

from harness.linalg import (
    MAX_OPERAND_ELEMENTS,
    lower_multiply,
    lower_solve,
    symmetric_multiply,
    symmetrize_from_lower,
    tiled_cholesky,
    tiled_inverse_from_cholesky,
)
from harness.linalg.blas_calls import OversizedCallError, Tile, gemm, record_calls
from harness.model.kernels import Matern32
from harness.references import DenseCholesky


def _sigma(n: int, seed: int = 0) -> np.ndarray:
    points = np.random.default_rng(seed).random((n, 2))
    return Matern32(1.0, 0.15, 1e-2).covariance(points)


@pytest.mark.parametrize("n, tile, panel", [(500, 64, 16), (777, 100, 30), (1000, 128, 128),
                                            (1500, 96, 40), (2000, 256, 64)])
def test_tiled_cholesky_and_inverse_equal_scipy(n, tile, panel):
    # sizes that are not multiples of the tile or the panel (ragged last tiles)
    sigma = _sigma(n)
    a = np.asfortranarray(np.tril(sigma) + np.triu(np.full_like(sigma, 7.0), k=1))
    assert tiled_cholesky(a, tile=tile, panel=panel) == 0
    expected = np.tril(scipy.linalg.cho_factor(sigma, lower=True)[0])
    np.testing.assert_allclose(np.tril(a), expected, rtol=1e-10, atol=1e-13)
    assert np.all(a[np.triu_indices(n, 1)] == 7.0)  # the strict upper triangle is untouched
    assert tiled_inverse_from_cholesky(a, tile=tile) == 0
    symmetrize_from_lower(a, tile=tile)
    inverse = np.linalg.inv(sigma)
    np.testing.assert_allclose(a, inverse, rtol=1e-8, atol=1e-10 * np.abs(inverse).max())


@pytest.mark.parametrize("columns", [1, 3, 130])
def test_tiled_solves_and_products_equal_scipy(columns):
    n, tile = 700, 96
    sigma = _sigma(n, seed=1)
    lower = np.tril(scipy.linalg.cho_factor(sigma, lower=True)[0])
    factor = np.asfortranarray(lower)
    b = np.random.default_rng(2).standard_normal((n, columns))
    cases = [
        (lower_solve(factor, b, tile=tile),
         scipy.linalg.solve_triangular(lower, b, lower=True)),
        (lower_solve(factor, b, transpose=True, tile=tile),
         scipy.linalg.solve_triangular(lower, b, lower=True, trans="T")),
        (lower_multiply(factor, b, tile=tile), lower @ b),
        (lower_multiply(factor, b, transpose=True, tile=tile), lower.T @ b),
        (symmetric_multiply(np.asfortranarray(np.tril(sigma)), b, tile=tile), sigma @ b),
    ]
    for got, expected in cases:
        np.testing.assert_allclose(got, expected, rtol=1e-9, atol=1e-9 * np.abs(expected).max())
    vector = lower_solve(factor, b[:, 0], tile=tile)
    assert vector.shape == (n,)


def test_not_positive_definite_reports_the_column():
    sigma = _sigma(300)
    sigma[200, 200] = -1.0  # the leading minor of order 201 is indefinite
    a = np.asfortranarray(np.tril(sigma))
    assert tiled_cholesky(a, tile=64, panel=16) == 201


def test_no_blas_operand_exceeds_the_bound():
    # n = 3,000 with a small bound (tiles of 128 rows: 16,384 entries): every call of
    # the factorization, the inverse and the solves stays within tile^2 entries
    n, tile, panel = 3000, 128, 32
    sigma = _sigma(n, seed=4)
    a = np.asfortranarray(np.tril(sigma))
    with record_calls() as calls:
        assert tiled_cholesky(a, tile=tile, panel=panel) == 0
        lower_solve(a, np.ones((n, 300)), tile=tile)
        lower_multiply(a, np.ones((n, 5)), transpose=True, tile=tile)
        assert tiled_inverse_from_cholesky(a, tile=tile) == 0
    assert len(calls) > 1000
    routines = {c.routine for c in calls}
    assert {"dpotrf", "dtrsm", "dsyrk", "dgemm", "dtrmm", "dtrtri", "dlauum"} <= routines
    assert max(c.largest_operand for c in calls) <= tile * tile


def test_the_dense_reference_keeps_its_calls_within_the_default_bound():
    # the whole DenseCholesky path (factor, certificate, solves, inverse) at default tiles
    points = np.random.default_rng(5).random((2500, 2))
    with record_calls() as calls:
        chol = DenseCholesky(points, Matern32(1.0, 0.2, 1e-2))
        chol.solve(np.ones(2500))
        chol.inverse()
    assert calls and max(c.largest_operand for c in calls) <= MAX_OPERAND_ELEMENTS


def test_an_oversized_call_is_refused():
    big = np.zeros((MAX_OPERAND_ELEMENTS // 512 + 1, 512), order="F")
    small = np.zeros((512, 1), order="F")
    out = np.zeros((big.shape[0], 1), order="F")
    with pytest.raises(OversizedCallError, match="exceeds the bound"):
        gemm(Tile(out, (0, out.shape[0]), (0, 1)), Tile(big, (0, big.shape[0]), (0, 512)),
             Tile(small, (0, 512), (0, 1)))


_LARGE = textwrap.dedent("""
    import sys
    import numpy as np
    from harness.model.kernels import Matern32, assemble_lower
    n, mode = int(sys.argv[1]), sys.argv[2]
    a = assemble_lower(Matern32(1.0, 0.1, 1e-2), np.random.default_rng(0).random((n, 2)))
    if mode == "tiled":
        from harness.linalg import tiled_cholesky
        info = tiled_cholesky(a)
    else:
        from scipy.linalg import lapack
        a, info = lapack.dpotrf(a, lower=1, overwrite_a=1, clean=0)
    assert info == 0, info
    print(repr(2.0 * float(np.sum(np.log(np.diagonal(a))))))
""")


def _logdet_in_child(n: int, mode: str, threads: str | None) -> float:
    env = dict(os.environ)
    if threads is not None:
        env["OPENBLAS_NUM_THREADS"] = threads
    proc = subprocess.run([sys.executable, "-c", _LARGE, str(n), mode], env=env,
                          capture_output=True, text=True, check=False)
    assert proc.returncode == 0, proc.stderr[-2000:]
    return float(proc.stdout.strip().splitlines()[-1])


@pytest.mark.slow
def test_tiled_cholesky_at_26633_points_with_two_threads_matches_single_threaded_lapack():
    # n = 26,633 (the size of the fields CO2 data) is where one threaded dpotrf call
    # crashed in this BLAS build; the tiled factorization runs with the default threads
    # and must agree with one single-threaded LAPACK dpotrf to 1e-12 relative in log det.
    n = 26_633
    tiled = _logdet_in_child(n, "tiled", None)
    single = _logdet_in_child(n, "dpotrf", "1")
    assert abs(tiled - single) <= 1e-12 * abs(single)
