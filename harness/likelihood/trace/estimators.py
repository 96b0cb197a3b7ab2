"""Stochastic trace estimators: Hutchinson (Rademacher) and Hutch++, with standard errors.

Both act on an ``OperatorFamily`` A_1..A_p and share one probe block among all p
operators, so the cost of the factor operations is paid once per block, not per
parameter. Both also return an estimate of the expected Fisher information
F_ij = 1/2 tr(A_i A_j) from the same products.

Hutchinson (Hutchinson 1989, Commun. Statist. Simul. Comput. 18, 1059-1076):
for Rademacher z, E[z' A z] = tr(A) and, for symmetric A,

    Var(z' A z) = 2 (||A||_F^2 - sum_i a_ii^2)

(Avron and Toledo 2011, J. ACM 58(2), art. 8, Lemma 1). With m probes the estimate is
the sample mean; its standard error is the sample standard deviation over sqrt(m).

Hutch++ (Meyer, Musco, Musco and Woodruff 2021, SOSA, Algorithm 1) with a budget of
m products per operator, k = m // 3:

    S, G ~ Rademacher (n, k);   Q = orth(A S);
    t = tr(Q' A Q) + (1/k) sum_j g_j' (I - QQ') A (I - QQ') g_j.

Its standard error (derived here). Given S, the first term is fixed and the second
is a Hutchinson estimate of tr(R), R = (I - QQ') A (I - QQ'), from k probes, so

    E[t | S] = tr(Q' A Q) + tr(R) = tr(A)                      (for every S),

because tr(R) = tr(A (I - QQ')) by cyclicity and idempotence. The law of total
variance then gives Var(t) = E_S[Var(t | S)] + Var_S(tr A) = E_S[Var(t | S)]: the
sketch adds no variance of its own beyond what it leaves in R. The sample variance
s_R^2 of the k values g_j' R g_j is unbiased for k Var(t | S), hence
SE^2 = s_R^2 / k is unbiased for Var(t). The identity E[t | S] = tr(A) holds for
non-symmetric A too, so Hutch++ stays unbiased on the non-symmetric form; its
variance guarantee is proved for symmetric A only.

Fisher information. For Rademacher z and any square M, E[z' M z] = tr(M), so with
u_i = A_i' z and v_j = A_j z, E[u_i' v_j] = tr(A_i A_j) (Hutchinson 1989; Avron and
Toledo 2011). For the symmetric form u_i = v_i and the estimate is
F_ij ~ 1/2 mean over probes of v_i' v_j, symmetrized. Hutch++ reuses its first
(Rademacher) block S for this.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from threadpoolctl import threadpool_limits

from harness.likelihood.trace.affine import AffineReduction
from harness.likelihood.trace.operators import OperatorFamily
from harness.linalg.rademacher import rademacher_probes

TRACE_METHODS = ("hutchinson", "hutchpp")


@dataclass(frozen=True)
class TraceEstimate:
    """Stochastic estimates of tr(A_i), i = 1..p, with their standard errors.

    Attributes
    ----------
    method : str
        ``hutchinson`` or ``hutchpp``.
    estimate, stderr : ndarray, shape (p,)
        Trace estimates and standard errors (see module docstring).
    probes : int
        Products with each operator: m for Hutchinson, 3 (m // 3) for Hutch++.
    solves, matvecs : int
        Columns through factor operations and through derivative products, summed
        over all operators (``harness.likelihood.trace.operators.Usage``).
    fisher, fisher_stderr : ndarray (p, p) or None
        Estimated 1/2 tr(A_i A_j) and its standard error, when asked for.
    symmetric : bool
        Whether the symmetric form was used.
    notes : tuple of str
    """

    method: str
    estimate: np.ndarray
    stderr: np.ndarray
    probes: int
    solves: int
    matvecs: int
    fisher: np.ndarray | None = None
    fisher_stderr: np.ndarray | None = None
    symmetric: bool = True
    notes: tuple[str, ...] = ()

    def to_dict(self) -> dict[str, object]:
        def arr(a: np.ndarray | None) -> object:
            return None if a is None else np.asarray(a).tolist()

        return {"method": self.method, "estimate": arr(self.estimate),
                "stderr": arr(self.stderr), "probes": self.probes, "solves": self.solves,
                "matvecs": self.matvecs, "fisher": arr(self.fisher),
                "fisher_stderr": arr(self.fisher_stderr), "symmetric": self.symmetric,
                "notes": list(self.notes)}


def _mean_and_stderr(samples: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Mean over the last axis and the sample SD (ddof = 1) over sqrt(count)."""
    k = samples.shape[-1]
    return samples.mean(axis=-1), samples.std(axis=-1, ddof=1) / np.sqrt(k)


def _fisher(operators: OperatorFamily, z: np.ndarray, az: np.ndarray,
            reduction: AffineReduction | None) -> tuple[np.ndarray, np.ndarray]:
    """1/2 mean of u_i' v_j (u = A' z, v = A z) and its standard error, symmetrized
    (over the full family: base products expanded by ``reduction`` when given)."""
    adj = az if operators.symmetric else operators.apply_all_adjoint(z)
    if reduction is not None:
        full = reduction.expand_products(z, az)
        adj = full if operators.symmetric else reduction.expand_products(z, adj)
        az = full
    samples = 0.5 * np.einsum("pnk,qnk->pqk", adj, az)
    samples = 0.5 * (samples + samples.transpose(1, 0, 2))
    return _mean_and_stderr(samples)


def _check_family(operators: OperatorFamily, probes: int, minimum: int, method: str,
                  reduction: AffineReduction | None) -> None:
    if int(probes) < minimum:
        raise ValueError(f"{method} needs probes >= {minimum} (for a standard error), "
                         f"got {probes}")
    if operators.count < 1:
        raise ValueError("the operator family is empty (no parameters)")
    if reduction is not None and operators.count != reduction.base_count:
        raise ValueError(f"the reduction needs a base family of {reduction.base_count} "
                         f"operators, got {operators.count}")


def _result(method: str, operators: OperatorFamily, estimate: np.ndarray,
            stderr: np.ndarray, probes: int, start: tuple[int, int],
            fisher: tuple[np.ndarray, np.ndarray] | None,
            reduction: AffineReduction | None) -> TraceEstimate:
    """The estimate over the full family (expanded when ``reduction`` is given)."""
    notes = operators.notes
    if reduction is not None:
        estimate, stderr = reduction.expand_traces(estimate, stderr, operators.n)
        notes = (*notes, "parameters with dSigma_i = a Sigma + b I estimated from one "
                         "shared operator, Sigma^-1: t_i = a n + b tr(Sigma^-1)")
    return TraceEstimate(
        method=method, estimate=estimate, stderr=stderr, probes=probes,
        solves=operators.usage.solves - start[0], matvecs=operators.usage.matvecs - start[1],
        fisher=None if fisher is None else fisher[0],
        fisher_stderr=None if fisher is None else fisher[1],
        symmetric=operators.symmetric, notes=notes)


def hutchinson(operators: OperatorFamily, *, probes: int = 64,
               rng: np.random.Generator | int | None = None,
               fisher: bool = False,
               reduction: AffineReduction | None = None) -> TraceEstimate:
    """Hutchinson's estimator with Rademacher probes for every operator of the family.

    t_i = (1/m) sum_j z_j' A_i z_j,  SE_i = sd_j(z_j' A_i z_j) / sqrt(m)
    (Hutchinson 1989; Avron and Toledo 2011, Lemma 1 for the Rademacher variance).

    Parameters
    ----------
    operators : OperatorFamily
    probes : int
        Number m >= 2 of probe vectors, shared by all operators.
    rng : Generator, int or None
        Source of the probes.
    fisher : bool
        Also estimate F_ij = 1/2 tr(A_i A_j) from the same probes.
    reduction : AffineReduction, optional
        ``operators`` is the base family of this reduction; results are for the full
        family (``affine`` module).
    """
    _check_family(operators, probes, 2, "hutchinson", reduction)
    m = int(probes)
    start = (operators.usage.solves, operators.usage.matvecs)
    z = rademacher_probes(operators.n, m, rng)
    az = operators.apply_all(z)
    samples = np.einsum("nk,pnk->pk", z, az)
    estimate, stderr = _mean_and_stderr(samples)
    fis = _fisher(operators, z, az, reduction) if fisher else None
    return _result("hutchinson", operators, estimate, stderr, m, start, fis, reduction)


def hutchpp(operators: OperatorFamily, *, probes: int = 64,
            rng: np.random.Generator | int | None = None,
            fisher: bool = False,
            reduction: AffineReduction | None = None) -> TraceEstimate:
    """Hutch++ (Meyer, Musco, Musco and Woodruff 2021, Algorithm 1) for every operator.

    With k = probes // 3: Q_i = orth(A_i S), t_i = tr(Q_i' A_i Q_i) + Hutchinson on
    (I - Q_i Q_i') A_i (I - Q_i Q_i') with the k columns of G. The sketch block S and
    the residual block G are shared by all operators; Q_i is per operator.
    SE_i is the conditional standard error of the residual term, unbiased for the
    total variance (module docstring).

    Parameters
    ----------
    operators : OperatorFamily
    probes : int
        Budget m >= 6 of products with each operator (rounded down to a multiple of 3).
    rng : Generator, int or None
    fisher : bool
        Also estimate F_ij = 1/2 tr(A_i A_j) from the Rademacher sketch block S.
    reduction : AffineReduction, optional
        As in ``hutchinson``.
    """
    _check_family(operators, probes, 6, "hutchpp", reduction)
    k = int(probes) // 3
    gen = np.random.default_rng(rng)
    start = (operators.usage.solves, operators.usage.matvecs)
    s = rademacher_probes(operators.n, k, gen)
    g = rademacher_probes(operators.n, k, gen)
    a_s = operators.apply_all(s)                                 # (p, n, k)
    # tall-skinny QR gains nothing from BLAS threads; on a loaded 2-core machine two
    # threads made it 10x slower (measured at n = 1,500, k = 20)
    with threadpool_limits(limits=1, user_api="blas"):
        q = np.stack([np.linalg.qr(block, mode="reduced")[0] for block in a_s])
    g_perp = np.stack([g - q_i @ (q_i.T @ g) for q_i in q])      # (I - QQ') G
    # both terms' quadratic forms in one pass over the factor: its solves are memory-
    # bound, so 2k columns at once cost far less than two passes of k
    forms = operators.quadratic_each(np.concatenate([q, g_perp], axis=2))
    deterministic = forms[:, :k].sum(axis=1)                    # tr(Q' A Q)
    samples = forms[:, k:]                                       # g' R g, R = P A P
    residual, stderr = _mean_and_stderr(samples)
    fis = _fisher(operators, s, a_s, reduction) if fisher else None
    return _result("hutchpp", operators, deterministic + residual, stderr, 3 * k, start, fis,
                   reduction)


def estimate_traces(operators: OperatorFamily, *, method: str, probes: int = 64,
                    rng: np.random.Generator | int | None = None,
                    fisher: bool = False,
                    reduction: AffineReduction | None = None) -> TraceEstimate:
    """Dispatch to ``hutchinson`` or ``hutchpp`` by name."""
    if method == "hutchinson":
        return hutchinson(operators, probes=probes, rng=rng, fisher=fisher,
                          reduction=reduction)
    if method == "hutchpp":
        return hutchpp(operators, probes=probes, rng=rng, fisher=fisher,
                       reduction=reduction)
    raise ValueError(f"unknown trace estimator {method!r}; known: {', '.join(TRACE_METHODS)}")
