"""Trace terms of the score and the Fisher information: exact (small n) or estimated.

ML (Rasmussen and Williams 2006, eq. 5.9; Mardia and Marshall 1984, Biometrika 71):

    g_i  = 1/2 a' Sigma_i a - 1/2 tr(Sigma^-1 Sigma_i),   a = Sigma^-1 r,
    F_ij = 1/2 tr(Sigma^-1 Sigma_i Sigma^-1 Sigma_j).

REML (Harville 1977, J. Amer. Statist. Assoc. 72, 320-338, section 6): Sigma^-1 inside
the traces becomes P = Sigma^-1 - B C B' with B = Sigma^-1 F and C = (F' Sigma^-1 F)^-1,
while P y = Sigma^-1 r = a. The corrections use only p_mean extra columns, so they are
computed exactly even when the ML traces are estimated:

    tr(P Sigma_i)          = tr(Sigma^-1 Sigma_i) - tr(C M_i),       M_i = B' Sigma_i B,
    tr(P Sigma_i P Sigma_j) = tr(Sigma^-1 Sigma_i Sigma^-1 Sigma_j)
                              - 2 tr(C E_i' Sigma^-1 E_j) + tr(C M_i C M_j),  E_i = Sigma_i B,

obtained by expanding (Sigma^-1 Sigma_i - B C B' Sigma_i)(Sigma^-1 Sigma_j - B C B' Sigma_j)
and using the cyclic property with C, M_i symmetric.

Exact traces form S_i = Sigma~^-1 Sigma~_i column by column from the solver's own
derivative products applied to the identity (the dense derivative blocks), so only the
trace arithmetic is exact, not the compression. They need p + 1 dense n x n arrays and
are refused above ``EXACT_TRACE_MAX_N``.

Estimated traces share one operator, Sigma^-1, among the parameters whose derivative
the factorization declares affine in Sigma (``derivative_affine``; the variance and
the nugget: ``harness.likelihood.trace.affine``).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from harness.likelihood.trace import (
    FactorizationOperators,
    declared_reduction,
    estimate_traces,
)
from harness.solvers.protocol import DifferentiableFactorization

#: Largest n for exact traces (p + 1 dense n x n arrays: 240 MiB at n = 2,500, p = 4).
EXACT_TRACE_MAX_N = 2500


class ExactTraceSizeError(ValueError):
    """Exact traces were asked for at an n beyond ``EXACT_TRACE_MAX_N``."""


@dataclass(frozen=True)
class TraceTerms:
    """tr(Sigma^-1 Sigma_i) (or tr(P Sigma_i)), standard errors, Fisher, costs, notes."""

    traces: np.ndarray
    stderr: np.ndarray
    fisher: np.ndarray | None
    probes: int
    solves: int
    matvecs: int
    notes: tuple[str, ...]

    def to_dict(self) -> dict[str, object]:
        return {"traces": self.traces.tolist(), "stderr": self.stderr.tolist(),
                "fisher": None if self.fisher is None else self.fisher.tolist(),
                "probes": self.probes, "solves": self.solves, "matvecs": self.matvecs,
                "notes": list(self.notes)}


def _exact_ml_terms(factorization: DifferentiableFactorization, count: int, *, fisher: bool,
                    max_n: int) -> tuple[np.ndarray, np.ndarray | None, int, int]:
    n = int(factorization.n)
    if n > max_n:
        raise ExactTraceSizeError(
            f"exact traces need {count + 1} dense {n:,} x {n:,} arrays; n = {n:,} exceeds "
            f"the limit of {max_n:,}; use trace='hutchinson' or trace='hutchpp' "
            "(stochastic estimates with standard errors)")
    eye = np.eye(n)
    traces = np.empty(count)
    products = []
    for i in range(count):
        s_i = np.asarray(factorization.solve(
            factorization.derivative_matvec(i, eye)), dtype=np.float64)
        traces[i] = float(np.trace(s_i))
        if fisher:
            products.append(s_i)
    fisher_ml = None
    if fisher:
        fisher_ml = np.empty((count, count))
        for i in range(count):
            for j in range(i, count):
                # tr(S_i S_j) = sum of S_i * S_j'
                value = 0.5 * float(np.einsum("ij,ji->", products[i], products[j]))
                fisher_ml[i, j] = fisher_ml[j, i] = value
    return traces, fisher_ml, count * n, count * n


def trace_terms(factorization: DifferentiableFactorization, count: int, *, method: str,
                probes: int = 64, rng: np.random.Generator | int | None = None,
                fisher: bool = False,
                sinv_design: np.ndarray | None = None, beta_cov: np.ndarray | None = None,
                exact_max_n: int = EXACT_TRACE_MAX_N) -> TraceTerms:
    """Trace terms for the score, ML or (with ``sinv_design`` = B, ``beta_cov`` = C) REML.

    Parameters
    ----------
    factorization : Factorization with ``derivative_matvec``
        (``harness.solvers.fallback.adapt`` supplies one when missing).
    count : int
        Number of parameters p.
    method : {"exact", "hutchinson", "hutchpp"}
    probes, rng : estimator options (ignored for ``exact``).
    fisher : bool
    sinv_design, beta_cov : ndarray, optional
        Sigma^-1 F and (F' Sigma^-1 F)^-1 for the REML corrections (module docstring).
    exact_max_n : int
    """
    notes: list[str] = []
    if method == "exact":
        traces, fisher_ml, solves, matvecs = _exact_ml_terms(
            factorization, count, fisher=fisher, max_n=exact_max_n)
        stderr = np.zeros(count)
        used_probes = 0
        notes.append("traces exact: Sigma^-1 Sigma_i formed from the solver's derivative "
                     "products on the identity")
    else:
        reduction = declared_reduction(factorization, count)
        operators = (FactorizationOperators(factorization, factorization.derivative_matvec,
                                            count) if reduction is None
                     else reduction.base_family(factorization,
                                                factorization.derivative_matvec))
        est = estimate_traces(operators, method=method, probes=probes, rng=rng,
                              fisher=fisher, reduction=reduction)
        traces, stderr, fisher_ml = est.estimate, est.stderr, est.fisher
        solves, matvecs, used_probes = est.solves, est.matvecs, est.probes
        notes.extend(est.notes)
        notes.append(f"traces estimated by {method} with {est.probes} products per "
                     "parameter (Rademacher probes)")
        if fisher:
            notes.append("Fisher information estimated from the same probes: "
                         "1/2 mean of (A_i' z)'(A_j z)")
    if sinv_design is not None and beta_cov is not None and sinv_design.shape[1]:
        b, c = sinv_design, beta_cov
        e = np.stack([np.asarray(factorization.derivative_matvec(i, b), dtype=np.float64)
                      for i in range(count)])                     # E_i = Sigma_i B
        m = np.einsum("na,pnb->pab", b, e)                        # M_i = B' E_i
        matvecs += count * b.shape[1]
        traces = traces - np.einsum("ab,pba->p", c, m)            # - tr(C M_i)
        if fisher_ml is not None:
            h = np.stack([np.asarray(factorization.solve(e_i), dtype=np.float64)
                          for e_i in e])                          # Sigma^-1 E_j
            solves += count * b.shape[1]
            cross = np.einsum("ab,pnb,qna->pq", c, e, h)          # tr(C E_i' H_j)
            cross = 0.5 * (cross + cross.T)
            cm = np.einsum("ab,pbc->pac", c, m)                   # C M_i
            quartic = np.einsum("pab,qba->pq", cm, cm)            # tr(C M_i C M_j)
            fisher_ml = fisher_ml - cross + 0.5 * quartic
        notes.append("REML: exact corrections tr(C B' Sigma_i B) (Harville 1977) applied "
                     "to the traces" + (" and the Fisher information" if fisher else ""))
    return TraceTerms(traces=np.asarray(traces, dtype=np.float64), stderr=np.asarray(stderr),
                      fisher=fisher_ml, probes=used_probes, solves=solves, matvecs=matvecs,
                      notes=tuple(notes))
