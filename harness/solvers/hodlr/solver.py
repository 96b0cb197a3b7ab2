"""The built-in compressed solver: HODLR compression + symmetric factorization of Sigma.

``factorize(points, kernel, theta, *, tol)`` builds a principal-axis cluster tree
(``harness.geometry.tree``), compresses every off-diagonal block of Sigma to the
per-block relative Frobenius tolerance ``tol`` (``aca`` module) and factors the
compressed matrix Sigma~ = W W' (``factor`` module, arXiv 1405.0223). All public
methods take and return vectors in the caller's point order: with P the tree
permutation (P x = x[perm]), the factor exposed is W_o = P' W P, so that
Sigma~ = W_o W_o' in the caller's order.

Threads: BLAS is held to one thread inside every call (the dense updates are small,
one BLAS thread per worker was 4x faster than multithreaded BLAS here) and the work
(blocks to compress, largest first; leaves; the nodes of a level, in the
factorization and in every product and solve) is spread over ``threads`` worker
threads (``parallel``; the results do not depend on their number); the compiled
kernels release the GIL.
"""

from __future__ import annotations

import math
import time
from dataclasses import dataclass

import numpy as np
from threadpoolctl import threadpool_limits

from harness.geometry.tree import ClusterTree, build_tree
from harness.model.kernels.classes import Kernel
from harness.solvers.hodlr.compressed import HodlrMatrix, LevelRanks, build_hodlr
from harness.solvers.hodlr.derivatives import (
    compress_lengthscale_derivative,
    derivative_product,
    derivative_role,
)
from harness.solvers.hodlr.entries import KernelEntries
from harness.solvers.hodlr.factor import SymmetricFactor, factor_symmetric


@dataclass(frozen=True)
class HodlrTimings:
    """Wall-clock seconds of the phases of ``factorize``."""

    tree: float
    compress: float
    factor: float

    @property
    def total(self) -> float:
        return self.tree + self.compress + self.factor

    def to_dict(self) -> dict[str, float]:
        return {"tree": self.tree, "compress": self.compress, "factor": self.factor,
                "total": self.total}


class HodlrFactorization:
    """Sigma~ = W W' for a kernel covariance compressed on a cluster tree.

    Built by ``factorize``; implements the ``harness.solvers.protocol`` Factorization
    with all optional members. Vectors are (n,) or (n, k), in the caller's order.
    """

    def __init__(self, *, kernel: Kernel, tol: float, tree: ClusterTree,
                 points_tree: np.ndarray, sigma: HodlrMatrix, factor: SymmetricFactor,
                 threads: int, derivative_rngs: list[np.random.Generator],
                 timings: HodlrTimings) -> None:
        self.kernel = kernel
        self.tol = tol
        self.tree = tree
        self.timings = timings
        self._points_tree = points_tree
        self._sigma = sigma
        self._factor = factor
        self._threads = threads
        self._derivative_rngs = derivative_rngs
        self._derivatives: dict[int, HodlrMatrix] = {}

    # -- protocol ------------------------------------------------------------------
    @property
    def n(self) -> int:
        return self.tree.n

    @property
    def nbytes(self) -> int:
        """Bytes held: compressed Sigma~, the factor W and compressed derivatives."""
        return int(self._sigma.nbytes + self._factor.nbytes
                   + sum(d.nbytes for d in self._derivatives.values()))

    @property
    def ranks(self) -> tuple[LevelRanks, ...]:
        """Max and mean off-diagonal rank per tree level (level 0 = the root's pair)."""
        return self._sigma.ranks

    def logdet(self) -> float:
        """log det Sigma~ (TPAMI 2016, eq. 18)."""
        return self._factor.logdet

    def solve(self, b: np.ndarray) -> np.ndarray:
        """Sigma~^-1 b = W'^-1 W^-1 b."""
        t = self._threads
        return self._apply(b, lambda x: self._factor.solve_transpose(
            self._factor.solve(x, threads=t), threads=t))

    def matvec(self, b: np.ndarray) -> np.ndarray:
        """Sigma~ b from the compressed blocks (leaves + U V' pairs)."""
        return self._apply(b, lambda x: self._sigma.matvec(x, threads=self._threads))

    def solve_sqrt(self, b: np.ndarray) -> np.ndarray:
        """W_o^-1 b."""
        return self._apply(b, lambda x: self._factor.solve(x, threads=self._threads))

    def solve_sqrt_transpose(self, b: np.ndarray) -> np.ndarray:
        """W_o^-T b (one pass; the generic stand-in would take three)."""
        return self._apply(b, lambda x: self._factor.solve_transpose(x,
                                                                     threads=self._threads))

    def apply_sqrt(self, b: np.ndarray) -> np.ndarray:
        """W_o b (b standard normal gives a sample with covariance Sigma~)."""
        return self._apply(b, lambda x: self._factor.apply(x, threads=self._threads))

    def apply_sqrt_transpose(self, b: np.ndarray) -> np.ndarray:
        """W_o' b (so that apply_sqrt(apply_sqrt_transpose(b)) = Sigma~ b)."""
        return self._apply(b, lambda x: self._factor.apply_transpose(x,
                                                                    threads=self._threads))

    def derivative_matvec(self, i: int, b: np.ndarray) -> np.ndarray:
        """dSigma/dtheta_i @ b (``derivatives`` module); compresses on first use."""
        role = derivative_role(self.kernel, i)
        if role.kind == "lengthscale":
            self.compress_derivatives([i])
        deriv = self._derivatives.get(i)
        return self._apply(b, lambda x: derivative_product(role, self.kernel, self._sigma,
                                                           deriv, x, threads=self._threads))

    def derivative_affine(self, i: int) -> tuple[float, float] | None:
        """(a, b) with dSigma~/dtheta_i = a Sigma~ + b I, exactly as ``derivative_matvec``
        forms it: (1, -tau2) for the variance, (0, tau2) for the nugget; None for a
        length scale (``derivatives`` module)."""
        role = derivative_role(self.kernel, i)
        if role.kind == "variance":
            return 1.0, -float(self.kernel.nugget)
        if role.kind == "nugget":
            return 0.0, float(self.kernel.nugget)
        return None

    # -- extras --------------------------------------------------------------------
    def compress_derivatives(self, indices: list[int] | None = None) -> None:
        """Compress the length-scale derivatives ``indices`` (all when None) now."""
        wanted = range(self.kernel.n_params) if indices is None else indices
        for i in wanted:
            role = derivative_role(self.kernel, i)
            if role.kind != "lengthscale" or i in self._derivatives:
                continue
            with threadpool_limits(limits=1, user_api="blas"):
                self._derivatives[i] = compress_lengthscale_derivative(
                    self.kernel, self._points_tree, self.tree, role.k, tol=self.tol,
                    rng=self._derivative_rngs[i], threads=self._threads)

    def _apply(self, b: np.ndarray, op) -> np.ndarray:
        b = np.asarray(b, dtype=float)
        if b.ndim not in (1, 2) or b.shape[0] != self.n:
            raise ValueError(f"expected an array of shape ({self.n},) or ({self.n}, k), "
                             f"got {b.shape}")
        x = b[self.tree.perm].reshape(self.n, -1)
        with threadpool_limits(limits=1, user_api="blas"):
            y = op(x)
        out = np.empty_like(y)
        out[self.tree.perm] = y
        return out.reshape(b.shape)


#: Off-diagonal ranks up to which the factor and every later product run on one thread
#: (``serial_if_thin``).
SERIAL_MAX_RANK = 8


def serial_if_thin(sigma: HodlrMatrix, threads: int) -> int:
    """One thread when every off-diagonal rank is at most ``SERIAL_MAX_RANK``, else
    ``threads``.

    A node's update with rank r <= 8 is a few small matrix products whose numpy calls
    hold the GIL longer than the BLAS work inside them, so two threads contend rather
    than share (development measurement on 2 cores: points on a line, n = 90,000, rank
    2, a 64-column ``solve_sqrt`` plus a 16-column ``solve`` took 0.39 s on one thread
    and 0.62 s on two; in the plane, n = 16,384, ranks 203-271, the same solves took
    the same time either way while the factorization ran 1.6x as fast on two threads).
    The compression before it keeps ``threads``: its ranks are not known until it ends.
    """
    top = max((level.max for level in sigma.ranks), default=0)
    return 1 if top <= SERIAL_MAX_RANK else threads


def factorize(points: np.ndarray, kernel: Kernel, theta: np.ndarray | None = None, *,
              tol: float, leaf_size: int = 128, rng: np.random.Generator | int | None = None,
              threads: int = 2, derivatives: bool = False) -> HodlrFactorization:
    """HODLR factorization of Sigma(theta) at ``points``.

    Parameters
    ----------
    points : ndarray, shape (n, d) or (n,)
    kernel : Kernel
    theta : ndarray or None
        Log-scale parameters overriding the kernel's (``kernel.with_theta``); None keeps
        the kernel as it is.
    tol : float
        Compression tolerance, 0 < tol < 1. Meaning: every off-diagonal block K of
        Sigma is replaced by a low-rank U V' with ||K - U V'||_F <= tol ||K||_F
        (tol / 2 for the blocked ACA, estimated, plus tol / 20 for the SVD truncation,
        exact; ``aca`` and ``entries`` modules), so ||Sigma - Sigma~||_F <= tol
        ||Sigma||_F; the factorization then reproduces Sigma~ to rounding (W W' =
        Sigma~; the bases' orthogonality is kept to tol / 100, ``orth`` module), so the
        error of every result is the compression's. The log-likelihood error scales
        with tol times the problem's sensitivity, which is largest for white-noise-like
        data (y' Sigma^-1 y weighs the rough directions the truncation discards), not
        with tol alone: ``covaudit`` measures it. Its size per tolerance on one problem
        (n = 16,000, 2D Matern 3/2, l = 0.1, nugget 1e-2, 5 seeds) is recorded by
        ``benchmarks/hodlr_accuracy.py`` in ``benchmarks/results/hodlr_accuracy.json``.
    leaf_size : int
        Maximum points per leaf of the cluster tree.
    rng : Generator, int or None
        Seeds the random residual checks of ACA.
    threads : int
        Worker threads (BLAS is held to one thread per worker).
    derivatives : bool
        Compress the length-scale derivatives now rather than on first use.

    Raises
    ------
    CompressionBreakdownError
        When the compressed matrix is not positive definite (tolerance too loose).
    """
    if not (isinstance(tol, int | float) and math.isfinite(tol) and 0.0 < tol < 1.0):
        raise ValueError(f"tol must be a number in (0, 1), got {tol!r}")
    if int(threads) != threads or threads < 1:
        raise ValueError(f"threads must be a positive integer, got {threads!r}")
    model = kernel if theta is None else kernel.with_theta(theta)
    gen = np.random.default_rng(rng)
    x = np.asarray(points, dtype=float)
    if x.ndim == 1:
        x = x[:, None]
    model.check_dimension(x.shape[1])
    t0 = time.perf_counter()
    tree = build_tree(x, leaf_size=leaf_size)
    points_tree = np.ascontiguousarray(x[tree.perm])
    t1 = time.perf_counter()
    build_rng, *derivative_rngs = gen.spawn(1 + model.n_params)
    with threadpool_limits(limits=1, user_api="blas"):
        sigma = build_hodlr(KernelEntries(kernel=model, points=points_tree), tree, tol=tol,
                            rng=build_rng, threads=int(threads))
        t2 = time.perf_counter()
        node_threads = serial_if_thin(sigma, int(threads))
        factor = factor_symmetric(sigma, tol=float(tol), threads=node_threads)
    t3 = time.perf_counter()
    out = HodlrFactorization(kernel=model, tol=float(tol), tree=tree, points_tree=points_tree,
                             sigma=sigma, factor=factor, threads=node_threads,
                             derivative_rngs=derivative_rngs,
                             timings=HodlrTimings(t1 - t0, t2 - t1, t3 - t2))
    if derivatives:
        out.compress_derivatives()
    return out
