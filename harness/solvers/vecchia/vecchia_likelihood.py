"""The Vecchia approximation's own log-likelihood, exact gradient and Fisher information.

One compiled pass over the supernodes (``local_factor``) gives, without storing U:
U'Y for Y = [y, F] (data and mean design, in maximin positions), log det Sigma~ =
-2 sum log U_kk, and per parameter the sums M_i = sum_k (u_k'Y)'(du_k,i'Y),
t_i = sum_k du_kk,i / u_kk and the Fisher information (Guinness 2021, Stat. Comput. 31,
"Gaussian process learning via Fisher scoring of Vecchia's approximation", secs. 2-3:
the log-likelihood, its gradient and its Fisher information in a single pass). Then,
with the GLS mean from the whitened data (``harness.model.gls``; beta = 0 for the zero
mean) and gamma = (1, -beta),

    L~     = -1/2 ||U'(y - F beta)||^2 + sum_k log U_kk - n/2 log 2 pi,
    dL~_i  = -gamma' M_i gamma + t_i        (the profile likelihood: beta is optimal,
                                             so its own change does not count),
    F_ij   = sum_k [ (R a_i)'(R a_j) + 2 r_i r_j ]   (``local_factor``).

The score is exact (derivative of L~ itself, not an estimate); tr(Sigma~^-1 dSigma~_i)
= -2 t_i exactly, so ``trace_terms`` carry zero standard errors. The Fisher matrix is
Guinness's: the information of each conditional y_k | y_c(k) with the conditioning
block distributed as under Sigma, N(0, Sigma[c, c]). It equals the Fisher information
of the Gaussian model N(0, Sigma~) wherever Sigma~ and Sigma agree on the conditioning
blocks (exactly under full conditioning) and differs from it by the approximation's
error there otherwise; the tests measure both. REML is not offered.
"""

from __future__ import annotations

import time

import numpy as np

from harness.model.evaluation import ModelEvaluation
from harness.model.gls import gls_loglik
from harness.model.kernels import Kernel
from harness.model.mean import design_matrix
from harness.solvers.vecchia.factorization import (
    DEFAULT_LAM,
    resolve_structure,
    scaled_ordered,
)
from harness.solvers.vecchia.local_factor import supernode_pass
from harness.solvers.vecchia.structure import StructureCache, VecchiaStructure
from harness.solvers.vecchia.vecchia_inputs import check_duplicates, check_status, kernel_code


def vecchia_evaluate(points: np.ndarray, y: np.ndarray, kernel: Kernel, *,
                     neighbours: int | None = None, rho: float | None = None,
                     lam: float | None = DEFAULT_LAM,
                     mean: str = "zero", score: bool = True, fisher: bool = True,
                     structure: VecchiaStructure | None = None,
                     cache: StructureCache | None = None) -> ModelEvaluation:
    """Log-likelihood, score and Fisher information of the Vecchia approximation.

    Parameters
    ----------
    points : ndarray, shape (n, d) or (n,)
    y : ndarray, shape (n,)
    kernel : Kernel
        At the parameters to evaluate (``kernel.with_theta(theta)``).
    neighbours, rho, lam, structure, cache
        As for ``factorize`` (the knob, the radius rule instead of it, and the reusable
        structure).
    mean : {"zero", "constant", "linear"}
        Mean model; beta by GLS under Sigma~ (profile likelihood).
    score, fisher : bool
        Whether to compute them (both come from the same pass; without either the pass
        skips the derivative blocks).

    Returns
    -------
    ModelEvaluation
        ``source="vecchia"``, ``trace_method="exact"``; ``logdet`` and ``quadratic``
        are those of Sigma~.
    """
    x = np.asarray(points, dtype=float)
    x = x[:, None] if x.ndim == 1 else x
    values = np.asarray(y, dtype=float).ravel()
    if values.size != x.shape[0]:
        raise ValueError(f"coordinates have {x.shape[0]} rows but values have "
                         f"{values.size}; they must match")
    if not np.all(np.isfinite(values)):
        raise ValueError(f"values: {int(np.sum(~np.isfinite(values)))} non-finite entries")
    code = kernel_code(kernel, x.shape[1])
    t0 = time.perf_counter()
    built, reused = resolve_structure(x, neighbours=neighbours, rho=rho, lam=lam,
                                      structure=structure, cache=cache)
    check_duplicates(built, x, kernel)
    t1 = time.perf_counter()
    perm = built.order.perm
    design = design_matrix(x, mean)
    data = np.ascontiguousarray(np.column_stack([values, design])[perm])
    n, nc = data.shape
    p = code.n_params
    g = built.groups
    n_sn = g.count
    want = bool(score or fisher)
    uy = np.zeros((n, nc))
    quad = np.zeros((n_sn, p, nc, nc) if want else (0, 0, 0, 0))
    trace = np.zeros((n_sn, p) if want else (0, 0))
    info = np.zeros((n_sn, p, p) if want else (0, 0, 0))
    diag = np.empty(n)
    status = np.empty(n_sn, dtype=np.int64)
    scaled = scaled_ordered(x, kernel, perm)
    supernode_pass(scaled, code.family, code.shape, code.variance, code.nugget,
                   code.ls_modes, code.has_nugget, g.member_ptr, g.members, g.set_ptr,
                   g.set_rows, g.col_ptr, False, np.empty(0), False, np.empty((p, 0)),
                   True, data, uy, quad, trace, info, diag, status)
    check_status(status, built, x, kernel)
    logdet = -2.0 * float(np.sum(np.log(diag)))
    fit = gls_loglik(logdet, uy[:, 0], uy[:, 1:], design[perm])
    t2 = time.perf_counter()
    score_vec = trace_terms = fisher_mat = trace_se = None
    if want:
        gamma = np.concatenate([[1.0], -fit.beta])
        m_total = quad.sum(axis=0)
        t_total = trace.sum(axis=0)
        score_vec = np.array([-gamma @ m_total[i] @ gamma for i in range(p)]) + t_total
        trace_terms = -2.0 * t_total
        trace_se = np.zeros(p)
        fisher_mat = info.sum(axis=0) if fisher else None
        if not score:
            score_vec = trace_terms = trace_se = None
    seconds = {"structure": 0.0 if reused else built.timings.total,
               "checks": t1 - t0 - (0.0 if reused else built.timings.total),
               "pass": t2 - t1}
    notes = (f"vecchia: {built.describe()}, lam = {built.groups.lam}, "
             f"{built.nnz_per_column:.1f} nonzeros per column; score and Fisher "
             "information exact for the approximation (Guinness 2021)",)
    return ModelEvaluation(
        source="vecchia", n=n, param_names=kernel.param_names, loglik=fit.loglik,
        logdet=logdet, quadratic=fit.quadratic, beta=fit.beta, score=score_vec,
        trace_terms=trace_terms, trace_stderr=trace_se, fisher=fisher_mat,
        trace_method="exact", seconds=seconds, notes=notes)
