"""Kullback-Leibler divergence of an approximate Gaussian model from the exact one.

For zero-mean Gaussians (e.g. Schafer, Katzfuss and Owhadi 2021, SIAM J. Sci. Comput.
43(3), eq. 2.1, the objective their factor minimizes),

    KL(N(0, Sigma) || N(0, Sigma~))
        = 1/2 [ tr(Sigma~^-1 Sigma) - n + log det Sigma~ - log det Sigma ]   (nats).

``kl_divergence_exact`` takes Sigma densely (or its lower Cholesky factor) and forms
tr(Sigma~^-1 Sigma) from the factorization's solves, a block of columns at a time.
``kl_divergence_from_kernel`` forms the same exact trace without holding Sigma: it builds
Sigma's columns from the kernel a block at a time, tr = sum_B tr((Sigma~^-1 Sigma[:, B])[B]),
and takes log det Sigma from an exact reference (a process that holds only the solver's
factorization and the reference's numbers uses it).
``kl_divergence_estimate`` needs only products with Sigma: Hutchinson's estimator
(Hutchinson 1989, Commun. Statist. Simul. Comput. 18) with Rademacher probes z,
tr(Sigma~^-1 Sigma) ~ mean_j z_j' Sigma~^-1 Sigma z_j, with the standard error of that
mean; log det Sigma must then be supplied by an exact reference.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

from harness.likelihood.trace.probes import rademacher_probes

#: Canonical name of the metric (nats).
KL_NAT = "kl_nat"

_BLOCK = 256


@dataclass(frozen=True)
class KlDivergence:
    """KL(N(0, Sigma) || N(0, Sigma~)) in nats.

    Attributes
    ----------
    value : float
    stderr : float
        0 for the exact form; the Monte-Carlo standard error of the estimate otherwise.
    trace : float
        tr(Sigma~^-1 Sigma) (exact or estimated).
    logdet_approx, logdet_exact : float
        log det Sigma~ and log det Sigma.
    n : int
    probes : int
        Rademacher probes used (0 for the exact form).
    """

    value: float
    stderr: float
    trace: float
    logdet_approx: float
    logdet_exact: float
    n: int
    probes: int = 0

    def to_dict(self) -> dict[str, float | int]:
        return {KL_NAT: self.value, f"{KL_NAT}_stderr": self.stderr, "kl_trace": self.trace,
                "kl_logdet_approx": self.logdet_approx, "kl_logdet_exact": self.logdet_exact,
                "kl_probes": self.probes}


def _combine(trace: float, logdet_approx: float, logdet_exact: float, n: int) -> float:
    return 0.5 * (trace - n + logdet_approx - logdet_exact)


def kl_divergence_exact(factorization: object, *, sigma: np.ndarray | None = None,
                        cholesky: np.ndarray | None = None) -> KlDivergence:
    """Exact KL divergence from a dense Sigma or its lower Cholesky factor L (one of the
    two) and any Factorization of Sigma~ (``solve`` and ``logdet``).

    With L, tr(Sigma~^-1 Sigma) = sum of L_B' Sigma~^-1 L_B over column blocks B and
    log det Sigma = 2 sum log L_ii; with Sigma, tr = sum of diag(Sigma~^-1 Sigma_B)
    and log det Sigma comes from numpy's Cholesky factor. A factorization with
    ``solve_sqrt`` (W^-1 for Sigma~ = W W') gives the trace from half the work:
    tr(Sigma~^-1 L L') = tr((W^-1 L)' (W^-1 L)) = ||W^-1 L||_F^2.
    """
    if (sigma is None) == (cholesky is None):
        raise ValueError("give exactly one of sigma= and cholesky=")
    solve = factorization.solve  # type: ignore[attr-defined]
    if cholesky is not None:
        chol = np.asarray(cholesky, dtype=float)
    else:
        chol = np.linalg.cholesky(np.asarray(sigma, dtype=float))
    n = chol.shape[0]
    whiten = getattr(factorization, "solve_sqrt", None)
    trace = 0.0
    for c0 in range(0, n, _BLOCK):
        c1 = min(n, c0 + _BLOCK)
        block = chol[:, c0:c1]
        if whiten is not None:
            white = whiten(block)
            trace += float(np.einsum("ij,ij->", white, white))
        else:
            trace += float(np.einsum("ij,ij->", block, solve(block)))
    logdet_exact = 2.0 * float(np.sum(np.log(np.diag(chol))))
    logdet_approx = float(factorization.logdet())  # type: ignore[attr-defined]
    return KlDivergence(value=_combine(trace, logdet_approx, logdet_exact, n), stderr=0.0,
                        trace=trace, logdet_approx=logdet_approx, logdet_exact=logdet_exact,
                        n=n)


def kl_divergence_from_kernel(factorization: object, kernel: object, points: np.ndarray, *,
                              logdet_exact: float, block: int = _BLOCK) -> KlDivergence:
    """Exact KL divergence with Sigma's columns built from ``kernel`` a block at a time.

    Parameters
    ----------
    factorization : Factorization
        Sigma~ (``solve``, ``logdet``).
    kernel : Kernel
        The exact model at the same parameters (``block(points, rows, cols)``).
    points : ndarray, shape (n, d)
    logdet_exact : float
        log det Sigma from an exact reference.
    block : int
        Columns per solve: memory O(n block), work n^2 kernel entries plus n / block
        solves with ``block`` right-hand sides.
    """
    x = np.asarray(points, dtype=float)
    n = x.shape[0]
    if not math.isfinite(logdet_exact):
        raise ValueError(f"logdet_exact must be finite, got {logdet_exact!r}")
    rows = np.arange(n)
    trace = 0.0
    for c0 in range(0, n, block):
        cols = rows[c0:min(n, c0 + block)]
        solved = factorization.solve(kernel.block(x, rows, cols))  # type: ignore[attr-defined]
        trace += float(np.trace(solved[cols]))
    logdet_approx = float(factorization.logdet())  # type: ignore[attr-defined]
    value = _combine(trace, logdet_approx, logdet_exact, n)
    if not math.isfinite(value):
        raise FloatingPointError(f"KL divergence is not finite (trace {trace!r}, log det "
                                 f"{logdet_approx!r})")
    return KlDivergence(value=value, stderr=0.0, trace=trace, logdet_approx=logdet_approx,
                        logdet_exact=float(logdet_exact), n=n)


def kl_divergence_estimate(factorization: object, sigma_matvec: Callable[[np.ndarray],
                                                                         np.ndarray], *,
                           logdet_exact: float, probes: int = 64,
                           rng: np.random.Generator | int | None = None,
                           block: int = 32) -> KlDivergence:
    """Hutchinson estimate of the KL divergence with its standard error.

    Parameters
    ----------
    factorization : Factorization
        Sigma~ (``solve``, ``logdet``, ``n``).
    sigma_matvec : callable
        B -> Sigma B for an (n, k) block (an exact product, e.g. the operator reference).
    logdet_exact : float
        log det Sigma from an exact reference.
    probes : int
        Rademacher probes (>= 2, for a standard error).
    rng : Generator, int or None
        Probe generator (``harness.likelihood.trace.probes.rademacher_probes``).
    block : int
        Probes per product.
    """
    if probes < 2:
        raise ValueError(f"probes must be >= 2 for a standard error, got {probes}")
    n = int(factorization.n)  # type: ignore[attr-defined]
    gen = np.random.default_rng(rng)
    samples = np.empty(probes)
    for j0 in range(0, probes, block):
        j1 = min(probes, j0 + block)
        z = rademacher_probes(n, j1 - j0, gen)
        az = factorization.solve(sigma_matvec(z))  # type: ignore[attr-defined]
        samples[j0:j1] = np.einsum("ij,ij->j", z, az)
    trace = float(samples.mean())
    stderr = 0.5 * float(samples.std(ddof=1)) / math.sqrt(probes)
    logdet_approx = float(factorization.logdet())  # type: ignore[attr-defined]
    return KlDivergence(value=_combine(trace, logdet_approx, logdet_exact, n), stderr=stderr,
                        trace=trace, logdet_approx=logdet_approx, logdet_exact=logdet_exact,
                        n=n, probes=probes)
