"""Dense Cholesky factorization of Sigma in float64, with a residual certificate.

Sigma = L L' is assembled (lower triangle, Fortran order) and factored in place by tiles
(``harness.linalg.tiled_cholesky``: no BLAS or LAPACK call ever sees an operand above
``tile_bounds.MAX_OPERAND_ELEMENTS`` entries, the shape that crashes the threaded BLAS
of this build); nothing else of size n x n is held. Its solves, products and inverse
go through the same tiles (``harness.linalg.tiled_triangular``). Two certificates of the
residual E = L L' - Sigma, both compared with LAPACK's test threshold 30
(``TESTING/dtest.in``), both raising ``CertificateError`` at or above it:

* ``"randomized"`` (default): an upper bound on the scaled residual of LAPACK's test
  routine DPOT01 (LAPACK 3 ``TESTING/LIN/dpot01.f``), from k Gaussian probe vectors
  Z = [z_1 .. z_k]. By Halko, Martinsson and Tropp, SIAM Review 53 (2011), Lemma 4.1
  (after Dixon 1983), ||E||_2 <= 10 sqrt(2 / pi) max_i ||E z_i|| with probability at
  least 1 - 10^-k; with ||E||_1 <= sqrt(n) ||E||_2 (E symmetric; Golub and Van Loan,
  *Matrix Computations*, 4th ed., eq. 2.3.11) the reported value

      ratio~ = sqrt(n) 10 sqrt(2/pi) max_i ||E z_i|| / (n ||Sigma||_1 eps)

  is at least the DPOT01 ratio with that probability (k = 4: 1 - 1e-4). E Z costs
  two triangular products L (L' Z) after the factorization and one symmetric product
  Sigma [Z, 1] of the assembled matrix before it: O(n^2) per probe, no extra n x n
  memory, no kernel evaluation.
* ``"dpot01"``: the full ratio ||Sigma - L L'||_1 / (n ||Sigma||_1 eps), formed by
  column blocks (about one more factorization and one more assembly).
"""

from __future__ import annotations

import time
from dataclasses import dataclass

import numpy as np

from harness.linalg.dense_budget import check_dense_budget
from harness.linalg.tiled_cholesky import (
    symmetrize_from_lower,
    tiled_cholesky,
    tiled_inverse_from_cholesky,
)
from harness.linalg.tiled_triangular import lower_multiply, lower_solve, symmetric_multiply
from harness.model.kernels import Kernel, assemble_lower

CERTIFICATE_THRESHOLD = 30.0
_BLOCK = 1024


class CertificateError(np.linalg.LinAlgError):
    """The dense factorization failed LAPACK's scaled-residual test."""


class SingularCovarianceError(np.linalg.LinAlgError):
    """Sigma is not numerically positive definite."""


#: Probe vectors of the randomized certificate (failure probability 10^-k).
CERTIFICATE_PROBES = 4
#: Certificate methods accepted by ``DenseCholesky``.
CERTIFICATE_METHODS = ("randomized", "dpot01")


def _duplicate_count(points: np.ndarray) -> int:
    unique = np.unique(np.asarray(points), axis=0)
    return int(points.shape[0] - unique.shape[0])


def _as_2d(points: np.ndarray) -> np.ndarray:
    points = np.asarray(points, dtype=float)
    return points[:, None] if points.ndim == 1 else points


@dataclass(frozen=True)
class _ProbeProducts:
    """Gaussian probes Z, Sigma Z and a lower bound on ||Sigma||_1, for the certificate.

    ``of_lower`` takes them from the assembled lower triangle before it is factored in
    place: one BLAS dsymm of Sigma with [Z, 1] (O(n^2 (k + 1)), reading the matrix
    once). ||Sigma||_1 >= max(max_i |(Sigma 1)_i|, max_i Sigma_ii), with equality for
    the covariances of this package, whose entries are all >= 0 (a lower bound only
    loosens the bound on the ratio, which divides by it).
    """

    z: np.ndarray
    sigma_z: np.ndarray
    sigma_norm_1: float

    @classmethod
    def of_lower(cls, lower: np.ndarray, *, probes: int,
                 rng: np.random.Generator) -> _ProbeProducts:
        n = lower.shape[0]
        z = np.asfortranarray(np.column_stack([rng.standard_normal((n, probes)),
                                               np.ones(n)]))
        product = symmetric_multiply(lower, z)
        norm = max(float(np.abs(product[:, -1]).max()), float(np.diagonal(lower).max()))
        return cls(np.asfortranarray(z[:, :-1]), np.asfortranarray(product[:, :-1]), norm)

    def ratio(self, factor: np.ndarray) -> float:
        """sqrt(n) 10 sqrt(2/pi) max_i ||L (L' z_i) - Sigma z_i|| / (n ||Sigma||_1 eps)."""
        n = factor.shape[0]
        product = lower_multiply(factor, lower_multiply(factor, self.z, transpose=True))
        product -= self.sigma_z
        residual = float(np.sqrt((product * product).sum(axis=0)).max())
        eps = np.finfo(float).eps
        bound_2norm = 10.0 * np.sqrt(2.0 / np.pi) * residual
        return float(np.sqrt(n) * bound_2norm / (n * self.sigma_norm_1 * eps))


class DenseCholesky:
    """Sigma(theta) = L L' at ``points``, a Factorization with its symmetric factor W = L.

    Parameters
    ----------
    points : ndarray, shape (n, d)
    kernel : Kernel
    memory_budget : int, optional
        Bytes allowed (default ``harness.linalg.dense_budget.default_memory_budget()``).
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
        probes_before: _ProbeProducts | None = None
        if certify and certificate_method == "randomized":
            start = time.perf_counter()
            probes_before = _ProbeProducts.of_lower(factor, probes=self._probes,
                                                    rng=self._rng)
            self.seconds["certify"] = time.perf_counter() - start
        start = time.perf_counter()
        info = tiled_cholesky(factor)
        self.seconds["factor"] = time.perf_counter() - start
        if info > 0:
            raise SingularCovarianceError(self._singular_message(info))
        if info < 0:
            raise np.linalg.LinAlgError(f"dpotrf: illegal argument {-info}")
        self.factor = factor
        self.certificate: float | None = None
        if certify:
            start = time.perf_counter()
            self.certificate = (self.dpot01_ratio() if probes_before is None
                                else probes_before.ratio(factor))
            self.seconds["certify"] = self.seconds.get("certify", 0.0) + (
                time.perf_counter() - start)
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

    def randomized_ratio(self, *, probes: int = CERTIFICATE_PROBES,
                         rng: np.random.Generator | int | None = None) -> float:
        """Probabilistic upper bound on the DPOT01 ratio of the current factor.

        As the default certificate (module docstring), but with Sigma Z and ||Sigma||_1
        from one pass over column blocks of Sigma re-evaluated from the kernel, so it
        can be called at any time after the factorization (the default certificate
        takes Sigma Z from the assembled matrix before it is overwritten).
        """
        n = self.n
        z = np.asfortranarray(np.random.default_rng(rng).standard_normal((n, int(probes))))
        sigma_z = np.zeros_like(z)
        idx = np.arange(n)
        col_abs = np.zeros(n)
        for j0 in range(0, n, _BLOCK):
            j1 = min(n, j0 + _BLOCK)
            # Sigma[j0:, J] (lower part of column block J); its strictly lower rows also
            # stand for the symmetric block Sigma[J, j1:]
            sigma = self.kernel.block(self.points, idx[j0:], idx[j0:j1])
            sigma_z[j0:] += sigma @ z[j0:j1]
            below = sigma[j1 - j0:]
            sigma_z[j0:j1] += below.T @ z[j1:]
            absolute = np.abs(sigma)
            col_abs[j0:j1] += absolute.sum(axis=0)
            col_abs[j1:] += absolute[j1 - j0:].sum(axis=1)
        return _ProbeProducts(z, sigma_z, float(col_abs.max())).ratio(self.factor)

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
        """Sigma^-1 b = L^-T (L^-1 b), by tiles."""
        self._columns(b)
        return lower_solve(self.factor, lower_solve(self.factor, b), transpose=True)

    def solve_sqrt(self, b: np.ndarray) -> np.ndarray:
        """L^-1 b."""
        self._columns(b)
        return lower_solve(self.factor, b)

    def solve_sqrt_transpose(self, b: np.ndarray) -> np.ndarray:
        """L^-T b."""
        self._columns(b)
        return lower_solve(self.factor, b, transpose=True)

    def apply_sqrt(self, b: np.ndarray) -> np.ndarray:
        """L b."""
        self._columns(b)
        return lower_multiply(self.factor, b)

    def matvec(self, b: np.ndarray) -> np.ndarray:
        """L (L' b), which equals Sigma b to rounding once the certificate passed."""
        self._columns(b)
        return lower_multiply(self.factor, lower_multiply(self.factor, b, transpose=True))

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
        """Sigma^-1 as a full symmetric array (a second n x n allocation; tiled dpotri)."""
        inv = np.array(self.factor, order="F", copy=True)
        info = tiled_inverse_from_cholesky(inv)
        if info != 0:
            raise SingularCovarianceError(f"the inverse of the Cholesky factor failed: "
                                          f"zero pivot at column {info}")
        symmetrize_from_lower(inv)
        return inv
