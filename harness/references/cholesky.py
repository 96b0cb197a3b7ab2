"""Dense Cholesky factorization of Sigma in float64, with a residual certificate.

Sigma = L L' is assembled (lower triangle, Fortran order) and factored in place by
``dpotrf`` (by column panels above 8,192, ``blocked_cholesky``); nothing else of size
n x n is held. Two certificates of the residual E = L L' - Sigma, both compared with
LAPACK's test threshold 30 (``TESTING/dtest.in``), both raising ``CertificateError``
at or above it:

* ``"randomized"`` (default): an upper bound on the scaled residual of LAPACK's test
  routine DPOT01 (LAPACK 3 ``TESTING/LIN/dpot01.f``), from k Gaussian probe vectors
  Z = [z_1 .. z_k]. By Halko, Martinsson and Tropp, SIAM Review 53 (2011), Lemma 4.1
  (after Dixon 1983), ||E||_2 <= 10 sqrt(2 / pi) max_i ||E z_i|| with probability at
  least 1 - 10^-k; with ||E||_1 <= sqrt(n) ||E||_2 (E symmetric; Golub and Van Loan,
  *Matrix Computations*, 4th ed., eq. 2.3.11) the reported value

      ratio~ = sqrt(n) 10 sqrt(2/pi) max_i ||E z_i|| / (n ||Sigma||_1 eps)

  is at least the DPOT01 ratio with that probability (k = 4: 1 - 1e-4). E Z costs
  two triangular products L (L' Z) and one pass of Sigma Z with Sigma re-evaluated by
  column blocks: O(n^2) per probe, no extra n x n memory.
* ``"dpot01"``: the full ratio ||Sigma - L L'||_1 / (n ||Sigma||_1 eps), formed by
  column blocks (about one more factorization and one more assembly).
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


#: Matrices up to this size go to one dpotrf call; larger ones are factored by panels.
CHOLESKY_PANEL = 8192
#: Panel width of the blocked factorization above ``CHOLESKY_PANEL``.
_BLOCKED_PANEL = 4096
#: Probe vectors of the randomized certificate (failure probability 10^-k).
CERTIFICATE_PROBES = 4
#: Certificate methods accepted by ``DenseCholesky``.
CERTIFICATE_METHODS = ("randomized", "dpot01")


def blocked_cholesky(a: np.ndarray, *, panel: int | None = None) -> int:
    """Lower Cholesky factor of a Fortran-ordered SPD array, in place, by column panels.

    Right-looking blocked algorithm (Golub and Van Loan, *Matrix Computations*, 4th ed.,
    Algorithm 4.2.10, "block Cholesky"): for each panel K, A_KK = L_KK L_KK' (LAPACK
    dpotrf), L_RK = A_RK L_KK^-T (BLAS dtrsm), and for each later column panel J the
    trailing update A_JJ -= L_JK L_JK' by a symmetric rank-k update (BLAS dsyrk, the
    lower triangle only: half the flops of a full product) and A_IJ -= L_IK L_JK'
    (dgemm) below it, so the flop count is the n^3 / 3 of one dpotrf. Only the lower
    triangle is read; the strict upper triangle is set to zero. One LAPACK call on the
    whole matrix crashed inside OpenBLAS 0.3.30's threaded dpotrf at n = 26,100 on
    this machine (segmentation fault; one thread, or n <= 8,192, ran fine), so
    matrices above ``CHOLESKY_PANEL`` never go to a single call; below it the single
    call is used. Temporaries: one (n x panel) block and a few (panel x panel) ones.

    Parameters
    ----------
    a : ndarray, shape (n, n), Fortran order
    panel : int, optional
        Panel width; default: one call up to ``CHOLESKY_PANEL``, else 4,096.

    Returns
    -------
    int
        0 on success, else the 1-based column at which the matrix is not positive definite.
    """
    n = a.shape[0]
    if panel is None:
        panel = n if n <= CHOLESKY_PANEL else _BLOCKED_PANEL
    for k0 in range(0, n, panel):
        k1 = min(n, k0 + panel)
        diag, info = lapack.dpotrf(np.asfortranarray(a[k0:k1, k0:k1]), lower=1, clean=1,
                                   overwrite_a=1)
        if info != 0:
            return k0 + info if info > 0 else info
        a[k0:k1, k0:k1] = diag
        if k1 == n:
            break
        below = blas.dtrsm(1.0, diag, np.asfortranarray(a[k1:, k0:k1]), side=1, lower=1,
                           trans_a=1, overwrite_b=1)
        a[k1:, k0:k1] = below
        for j0 in range(k1, n, panel):
            j1 = min(n, j0 + panel)
            rows = below[j0 - k1:j1 - k1]
            a[j0:j1, j0:j1] = blas.dsyrk(-1.0, rows, beta=1.0,
                                         c=np.asfortranarray(a[j0:j1, j0:j1]), lower=1,
                                         overwrite_c=1)
            for i0 in range(j1, n, panel):  # row chunks keep the product at panel^2
                i1 = min(n, i0 + panel)
                a[i0:i1, j0:j1] -= below[i0 - k1:i1 - k1] @ rows.T
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
        Compute the certificate and raise ``CertificateError`` when it is >= 30.
    certificate_method : {"randomized", "dpot01"}
        The probe bound on the DPOT01 ratio (default, O(n^2) per probe) or the full
        DPOT01 ratio (module docstring).
    probes : int
        Probe vectors of the randomized certificate (it bounds the DPOT01 ratio with
        probability at least 1 - 10^-probes).
    rng : Generator, int or None
        Draws the probe vectors.
    extra_squares : int
        Further n x n arrays the caller will allocate (inverse, Fisher), counted in the
        budget check before anything is assembled.

    Attributes
    ----------
    certificate : float or None
        The certificate (None when ``certify=False``): the randomized bound or the
        DPOT01 ratio, per ``certificate_method``.
    seconds : dict
        ``assemble``, ``factor`` and ``certify`` wall-clock seconds.
    """

    def __init__(self, points: np.ndarray, kernel: Kernel, *, memory_budget: int | None = None,
                 certify: bool = True, extra_squares: int = 0,
                 certificate_method: str = "randomized", probes: int = CERTIFICATE_PROBES,
                 rng: np.random.Generator | int | None = None) -> None:
        if certificate_method not in CERTIFICATE_METHODS:
            raise ValueError(f"certificate_method must be one of {CERTIFICATE_METHODS}, "
                             f"got {certificate_method!r}")
        if int(probes) != probes or probes < 1:
            raise ValueError(f"probes must be a positive integer, got {probes!r}")
        self.points = _as_2d(points)
        self.kernel = kernel
        self.certificate_method = certificate_method
        self._probes = int(probes)
        self._rng = np.random.default_rng(rng)
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
                    f"{CERTIFICATE_THRESHOLD:g} (LAPACK DPOT01; "
                    f"{self._method_words()}) at n = {n:,} for "
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

    def _method_words(self) -> str:
        if self.certificate_method == "dpot01":
            return "full ratio"
        return (f"upper bound from {self._probes} random probes, holding with probability "
                f">= 1 - 1e-{self._probes}")

    def _certify(self) -> float:
        """The certificate of ``certificate_method``."""
        if self.certificate_method == "dpot01":
            return self.dpot01_ratio()
        return self.randomized_ratio(probes=self._probes, rng=self._rng)

    def randomized_ratio(self, *, probes: int = CERTIFICATE_PROBES,
                         rng: np.random.Generator | int | None = None) -> float:
        """Probabilistic upper bound on the DPOT01 ratio from ``probes`` Gaussian vectors.

        ratio~ = sqrt(n) 10 sqrt(2/pi) max_i ||(L L' - Sigma) z_i|| / (n ||Sigma||_1 eps),
        at least the DPOT01 ratio with probability >= 1 - 10^-probes (module docstring;
        Halko, Martinsson and Tropp 2011, Lemma 4.1). Sigma Z and ||Sigma||_1 come from
        one pass over column blocks of Sigma; L (L' Z) from two BLAS dtrmm calls.
        """
        n = self.n
        z = np.asfortranarray(np.random.default_rng(rng).standard_normal((n, int(probes))))
        c = self.factor
        product = blas.dtrmm(1.0, c, blas.dtrmm(1.0, c, z, lower=1, trans_a=1), lower=1)
        idx = np.arange(n)
        col_abs = np.zeros(n)
        for j0 in range(0, n, _BLOCK):
            j1 = min(n, j0 + _BLOCK)
            # Sigma[j0:, J] (lower part of column block J); its strictly lower rows also
            # stand for the symmetric block Sigma[J, j1:]
            sigma = self.kernel.block(self.points, idx[j0:], idx[j0:j1])
            product[j0:] -= sigma @ z[j0:j1]
            below = sigma[j1 - j0:]
            product[j0:j1] -= below.T @ z[j1:]
            absolute = np.abs(sigma)
            col_abs[j0:j1] += absolute.sum(axis=0)
            col_abs[j1:] += absolute[j1 - j0:].sum(axis=1)
        residual = float(np.sqrt((product * product).sum(axis=0)).max())
        eps = np.finfo(float).eps
        bound_2norm = 10.0 * np.sqrt(2.0 / np.pi) * residual
        return float(np.sqrt(n) * bound_2norm / (n * float(col_abs.max()) * eps))

    def dpot01_ratio(self) -> float:
        """The full DPOT01 ratio ||Sigma - L L'||_1 / (n ||Sigma||_1 eps), by column blocks."""
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
