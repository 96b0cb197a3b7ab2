"""Log-likelihood and score of a Gaussian process through any Factorization.

One code path serves the dense reference and every compressed solver:

    L   = -1/2 r' Sigma~^-1 r - 1/2 log det Sigma~ - n/2 log(2 pi)   (REML: Harville 1974)
    g_i = 1/2 a' Sigma_i a - 1/2 tr(Sigma~^-1 Sigma_i),   a = Sigma~^-1 r,  r = y - F beta

(Rasmussen and Williams 2006, eqs. 2.30 and 5.9; the GLS estimate beta is profiled out,
which leaves the score's form unchanged because dL/dbeta = 0 at beta). L and beta come
from ``harness.model.gls.gls_loglik`` on whitened data when the factorization offers
``solve_sqrt`` and from Gram products through solves otherwise (``whitening``). The
trace terms are exact at small n or estimated (``traces``); the quadratic terms use the
factorization's derivative products, supplied generically when it has none
(``harness.solvers.fallback``).
"""

from __future__ import annotations

import time

import numpy as np

from harness.likelihood.traces import EXACT_TRACE_MAX_N, trace_terms
from harness.likelihood.whitening import fit_mean
from harness.model.evaluation import ModelEvaluation
from harness.model.kernels import Kernel
from harness.model.mean import design_matrix
from harness.solvers.fallback import adapt
from harness.solvers.protocol import Factorization

TRACE_CHOICES = ("exact", "hutchinson", "hutchpp")


def check_data(points: np.ndarray, y: np.ndarray, n: int | None = None
               ) -> tuple[np.ndarray, np.ndarray]:
    """Points as (n, d) float and y as (n,) float, refusing mismatches and non-finite y."""
    points = np.asarray(points, dtype=np.float64)
    points = points[:, None] if points.ndim == 1 else points
    y = np.asarray(y, dtype=np.float64)
    if y.ndim != 1:
        raise ValueError(f"y must be one value per point, got shape {y.shape}")
    if points.shape[0] != y.size:
        raise ValueError(f"coordinates have {points.shape[0]} rows but values have "
                         f"{y.size}; they must match")
    if n is not None and n != y.size:
        raise ValueError(f"the factorization has n = {n} but there are {y.size} values")
    if not np.all(np.isfinite(y)):
        raise ValueError(f"y has {int(np.sum(~np.isfinite(y)))} non-finite value(s)")
    return points, y


def evaluate_likelihood(factorization: Factorization, points: np.ndarray, y: np.ndarray,
                        kernel: Kernel, *, mean: str = "zero", reml: bool = False,
                        score: bool = True, trace: str = "exact", probes: int = 64,
                        rng: np.random.Generator | int | None = None, fisher: bool = False,
                        exact_max_n: int = EXACT_TRACE_MAX_N) -> ModelEvaluation:
    """Log-likelihood, score and Fisher information at the factorization's parameters.

    Parameters
    ----------
    factorization : Factorization
        Of Sigma~ for ``kernel`` at ``points`` (wrapped by ``harness.solvers.fallback.adapt``
        when it is not already).
    points : ndarray, shape (n, d)
    y : ndarray, shape (n,)
    kernel : Kernel
        The model the factorization represents (parameters set); its ``param_names``
        order the score.
    mean : {"zero", "constant", "linear"}
    reml : bool
        Restricted likelihood; traces use the projection P (``traces``).
    score : bool
        Compute the score (and traces); False gives the value only.
    trace : {"exact", "hutchinson", "hutchpp"}
        How tr(Sigma^-1 Sigma_i) is obtained; ``exact`` is refused above ``exact_max_n``.
    probes : int
        Products per parameter of the estimator.
    rng : Generator, int or None
        Probe source.
    fisher : bool
        Also the expected Fisher information (exact or estimated like the traces).

    Returns
    -------
    ModelEvaluation
    """
    if trace not in TRACE_CHOICES:
        raise ValueError(f"unknown trace method {trace!r}; known: {', '.join(TRACE_CHOICES)}")
    fac = adapt(factorization, points, kernel)
    points, y = check_data(points, y, fac.n)
    notes: list[str] = list(fac.notes)
    seconds: dict[str, float] = {}

    start = time.perf_counter()
    logdet = fac.logdet()
    seconds["logdet"] = time.perf_counter() - start

    start = time.perf_counter()
    design = design_matrix(points, mean)
    fit, how = fit_mean(fac, y, design, logdet, reml=reml)
    notes.append(how)
    residual = y - design @ fit.beta
    need_score = score or fisher
    a = fac.solve(residual) if need_score else None
    seconds["solve"] = time.perf_counter() - start

    p = kernel.n_params
    score_vec = traces = stderr = fisher_mat = None
    probes_used = solves = matvecs = 0
    if need_score and a is not None:
        start = time.perf_counter()
        quad = np.array([float(a @ fac.derivative_matvec(i, a)) for i in range(p)])
        sinv_design = fac.solve(design) if (reml and design.shape[1]) else None
        terms = trace_terms(fac, p, method=trace, probes=probes, rng=rng, fisher=fisher,
                            sinv_design=sinv_design,
                            beta_cov=fit.beta_cov if sinv_design is not None else None,
                            exact_max_n=exact_max_n)
        traces, stderr, fisher_mat = terms.traces, terms.stderr, terms.fisher
        probes_used, solves, matvecs = terms.probes, terms.solves + 1, terms.matvecs + p
        score_vec = 0.5 * quad - 0.5 * traces
        notes.extend(terms.notes)
        seconds["score"] = time.perf_counter() - start
    return ModelEvaluation(
        source="factorization", n=fac.n, param_names=kernel.param_names, loglik=fit.loglik,
        logdet=logdet, quadratic=fit.quadratic, beta=fit.beta, score=score_vec if score else None,
        trace_terms=traces, trace_stderr=stderr, fisher=fisher_mat,
        trace_method=trace if need_score else "none", probes=probes_used, solves=solves,
        matvecs=matvecs, seconds=seconds, notes=tuple(notes))
