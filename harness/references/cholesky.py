"""Dense Cholesky factorization of Sigma in float64, certified by LAPACK's test ratio.

Sigma = L L' is assembled (lower triangle, Fortran order) and factored in place by
``dpotrf``; nothing else of size n x n is held. The certificate is the scaled residual
of LAPACK's test routine DPOT01 (LAPACK 3 ``TESTING/LIN/dpot01.f``):

    ratio = ||Sigma - L L'||_1 / (n ||Sigma||_1 eps),

which LAPACK's test driver accepts below the threshold 30 (``TESTING/dtest.in``).
A ratio at or above it means the factor is not trustworthy and is an error.
The residual is formed by column blocks: Sigma's blocks are re-evaluated from the
kernel and L L' blocks come from BLAS products, so the check costs about one more
factorization and one more assembly but no extra n x n memory.
"""

from __future__ import annotations

import time

import numpy as np
import scipy.linalg
from scipy.linalg import blas, lapack

from harness.model.kernels import Kernel, assemble_lower
from harness.references.budget import check_dense_budget

CERTIFICATE_THRESHOLD = 30.0
_BLOCK = 1024


class CertificateError(np.linalg.LinAlgError):
    """The dense factorization failed LAPACK's scaled-residual test."""


class SingularCovarianceError(np.linalg.LinAlgError):
    """Sigma is not numerically positive definite."""


#: Panel width of ``blocked_cholesky``; matrices up to this size go to one dpotrf call.
CHOLESKY_PANEL = 8192


def blocked_cholesky(a: np.ndarray, *, panel: int = CHOLESKY_PANEL) -> int:
    """Lower Cholesky factor of a Fortran-ordered SPD array, in place, by column panels.

    Right-looking blocked algorithm (Golub and Van Loan, *Matrix Computations*, 4th ed.,
    Algorithm 4.2.x "block Cholesky"): for each panel K, A_KK = L_KK L_KK' (LAPACK
    dpotrf), L_RK = A_RK L_KK^-T (triangular solve), and the trailing lower triangle
    A_RR -= L_RK L_RK' one column panel at a time. Only the lower triangle is read;
    the strict upper triangle is set to zero. One LAPACK call on the whole matrix
    crashed inside OpenBLAS 0.3.30's threaded dpotrf at n = 26,100 on this machine
    (segmentation fault; one thread, or n <= 8,192, ran fine), so matrices above the
    panel width never go to a single call. Below it the single call is used: at
    n = 8,000 it was twice as fast as two 4,096 panels. Temporaries stay at
    (n x panel) doubles.

    Returns
    -------
    int
        0 on success, else the 1-based column at which the matrix is not positive definite.
    """
    n = a.shape[0]
    for k0 in range(0, n, panel):
        k1 = min(n, k0 + panel)
        diag, info = lapack.dpotrf(np.asfortranarray(a[k0:k1, k0:k1]), lower=1, clean=1)
        if info != 0:
            return k0 + info if info > 0 else info
        a[k0:k1, k0:k1] = diag
        if k1 == n:
            break
        below = scipy.linalg.solve_triangular(diag, a[k1:, k0:k1].T, lower=True,
                                              check_finite=False).T
        a[k1:, k0:k1] = below
        for j0 in range(k1, n, panel):
            j1 = min(n, j0 + panel)
            a[j0:, j0:j1] -= below[j0 - k1:] @ below[j0 - k1:j1 - k1].T
    for j in range(1, n):
        a[:j, j] = 0.0  # contiguous in Fortran order
    return 0


def _duplicate_count(points: np.ndarray) -> int:
    unique = np.unique(np.asarray(points), axis=0)
    return int(points.shape[0] - unique.shape[0])


def _as_2d(points: np.ndarray) -> np.ndarray:
    points = np.asarray(points, dtype=float)
    return points[:, None] if points.ndim == 1 else points


class DenseCholesky:
    """Sigma(theta) = L L' at ``points``, a Factorization with its symmetric factor W = L.

    Parameters
    ----------
    points : ndarray, shape (n, d)
    kernel : Kernel
    memory_budget : int, optional
        Bytes allowed (default ``harness.references.budget.default_memory_budget()``).
    certify : bool
        Compute the DPOT01 ratio and raise ``CertificateError`` when it is >= 30.
    extra_squares : int
        Further n x n arrays the caller will allocate (inverse, Fisher), counted in the
        budget check before anything is assembled.

    Attributes
    ----------
    certificate : float or None
        The DPOT01 ratio (None when ``certify=False``).
    seconds : dict
        ``assemble``, ``factor`` and ``certify`` wall-clock seconds.
    """

    def __init__(self, points: np.ndarray, kernel: Kernel, *, memory_budget: int | None = None,
                 certify: bool = True, extra_squares: int = 0) -> None:
        self.points = _as_2d(points)
        self.kernel = kernel
        n = self.points.shape[0]
        check_dense_budget(n, budget=memory_budget, score=extra_squares >= 1,
                           fisher=extra_squares >= 2, n_params=max(0, extra_squares - 1))
        self.seconds: dict[str, float] = {}
        start = time.perf_counter()
        factor = assemble_lower(kernel, self.points)
        self.seconds["assemble"] = time.perf_counter() - start
        start = time.perf_counter()
        info = blocked_cholesky(factor)
        self.seconds["factor"] = time.perf_counter() - start
        if info > 0:
            raise SingularCovarianceError(self._singular_message(info))
        if info < 0:
            raise np.linalg.LinAlgError(f"dpotrf: illegal argument {-info}")
        self.factor = factor
        self.certificate: float | None = None
        if certify:
            start = time.perf_counter()
            self.certificate = self._certify()
            self.seconds["certify"] = time.perf_counter() - start
            if not self.certificate < CERTIFICATE_THRESHOLD:
                raise CertificateError(
                    f"dense Cholesky failed its certificate: scaled residual "
                    f"||Sigma - L L'||_1 / (n ||Sigma||_1 eps) = {self.certificate:.3g} >= "
                    f"{CERTIFICATE_THRESHOLD:g} (LAPACK DPOT01) at n = {n:,} for "
                    f"{kernel.describe()}; the matrix is too ill-conditioned for float64: "
                    "increase the nugget or shorten the length scale"
                )

    def _singular_message(self, column: int) -> str:
        n = self.points.shape[0]
        msg = (f"Sigma is not positive definite (Cholesky broke down at column {column} "
               f"of {n:,}) for {self.kernel.describe()}")
        dups = _duplicate_count(self.points)
        if dups and self.kernel.nugget == 0.0:
            return msg + (f": {dups} duplicate point(s) with zero nugget make Sigma singular; "
                          "add a nugget (e.g. nugget=1e-6) or average duplicates")
        return msg + "; the matrix is numerically singular: add or increase the nugget"

    def _certify(self) -> float:
        n = self.n
        idx = np.arange(n)
        col_abs_err = np.zeros(n)
        col_abs_sigma = np.zeros(n)
        c = self.factor
        for j0 in range(0, n, _BLOCK):
            j1 = min(n, j0 + _BLOCK)
            sigma = self.kernel.block(self.points, idx[j0:], idx[j0:j1])
            product = c[j0:, :j1] @ c[j0:j1, :j1].T
            err = np.abs(sigma - product)
            sig = np.abs(sigma)
            # keep the lower triangle (i >= j) of the diagonal block only
            upper = np.triu_indices(j1 - j0, k=1)
            err[upper] = 0.0
            sig[upper] = 0.0
            for store, block in ((col_abs_err, err), (col_abs_sigma, sig)):
                store[j0:j1] += block.sum(axis=0)
                # symmetric counterpart: entry (i, j), i > j, also sits in column i
                off = block.sum(axis=1)
                off[: j1 - j0] -= np.diagonal(block)
                store[j0:] += off
        eps = np.finfo(float).eps
        norm_sigma = float(col_abs_sigma.max())
        return float(col_abs_err.max() / (n * norm_sigma * eps))

    # -- Factorization protocol --------------------------------------------------
    @property
    def n(self) -> int:
        return int(self.points.shape[0])

    @property
    def nbytes(self) -> int:
        return int(self.factor.nbytes)

    def logdet(self) -> float:
        """log det Sigma = 2 sum_i log L_ii."""
        return 2.0 * float(np.sum(np.log(np.diagonal(self.factor))))

    def _columns(self, b: np.ndarray) -> tuple[np.ndarray, bool]:
        b = np.asarray(b, dtype=float)
        if b.shape[0] != self.n:
            raise ValueError(f"expected {self.n} rows, got array of shape {b.shape}")
        vector = b.ndim == 1
        return (b[:, None] if vector else b), vector

    def solve(self, b: np.ndarray) -> np.ndarray:
        """Sigma^-1 b by two triangular solves (``dpotrs``)."""
        cols, vector = self._columns(b)
        x, info = lapack.dpotrs(self.factor, cols, lower=1)
        return x[:, 0] if vector else x

    def solve_sqrt(self, b: np.ndarray) -> np.ndarray:
        """L^-1 b."""
        cols, vector = self._columns(b)
        x = scipy.linalg.solve_triangular(self.factor, cols, lower=True, check_finite=False)
        return x[:, 0] if vector else x

    def solve_sqrt_transpose(self, b: np.ndarray) -> np.ndarray:
        """L^-T b."""
        cols, vector = self._columns(b)
        x = scipy.linalg.solve_triangular(self.factor, cols, lower=True, trans="T",
                                          check_finite=False)
        return x[:, 0] if vector else x

    def apply_sqrt(self, b: np.ndarray) -> np.ndarray:
        """L b."""
        cols, vector = self._columns(b)
        x = blas.dtrmm(1.0, self.factor, np.asfortranarray(cols), lower=1)
        return x[:, 0] if vector else x

    def matvec(self, b: np.ndarray) -> np.ndarray:
        """L (L' b), which equals Sigma b to rounding once the certificate passed."""
        cols, vector = self._columns(b)
        y = blas.dtrmm(1.0, self.factor, np.asfortranarray(cols), lower=1, trans_a=1)
        x = blas.dtrmm(1.0, self.factor, y, lower=1)
        return x[:, 0] if vector else x

    def derivative_matvec(self, i: int, b: np.ndarray) -> np.ndarray:
        """dSigma/dtheta_i @ b, assembling row blocks of the derivative on the fly."""
        cols, vector = self._columns(b)
        idx = np.arange(self.n)
        out = np.empty_like(cols)
        for r0 in range(0, self.n, _BLOCK):
            r1 = min(self.n, r0 + _BLOCK)
            out[r0:r1] = self.kernel.derivative_block(self.points, idx[r0:r1], idx, i) @ cols
        return out[:, 0] if vector else out

    def inverse(self) -> np.ndarray:
        """Sigma^-1 as a full symmetric array (a second n x n allocation; ``dpotri``)."""
        inv, info = lapack.dpotri(self.factor, lower=1, overwrite_c=0)
        if info != 0:
            raise SingularCovarianceError(f"dpotri failed with info = {info}")
        inv = np.asarray(inv)
        for j0 in range(0, self.n, _BLOCK):
            j1 = min(self.n, j0 + _BLOCK)
            diag = inv[j0:j1, j0:j1]
            upper = np.triu_indices(j1 - j0, k=1)
            diag[upper] = diag.T[upper]
            inv[j0:j1, j1:] = inv[j1:, j0:j1].T
        return inv
