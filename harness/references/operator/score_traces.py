"""Score traces tr(Sigma^-1 Sigma_i) as the preconditioner's trace plus an exact correction.

With P the preconditioner and P_i its derivative products (``derivative_matvec``),

    tr(Sigma^-1 Sigma_i) = tr(P^-1 P_i) + tr(Sigma^-1 Sigma_i - P^-1 P_i).

Both terms are Hutchinson estimates, E[z' A z] = tr(A) for Rademacher z (Hutchinson
1990, Commun. Statist. Simul. 19(2)): the first with many probes at the preconditioner's
low cost, the second with exact products Sigma_i z and CG solves Sigma^-1 z. Since
Sigma ~ P and Sigma_i ~ P_i, the per-probe differences are small, and so is their
sample spread (the preconditioner acts as a control variate). The standard error of
each is its sample standard deviation over sqrt(probes); the two are independent, so
their variances add. Without ``derivative_matvec`` the first term is dropped and the
second is the plain estimate of tr(Sigma^-1 Sigma_i).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from harness.linalg.rademacher import rademacher_probes
from harness.references.operator.products import KernelOperator
from harness.solvers.protocol import Factorization


@dataclass(frozen=True)
class PreconditionerTraces:
    """Hutchinson estimate of tr(P^-1 P_i) with its standard error (zeros if unavailable)."""

    estimate: np.ndarray
    se: np.ndarray
    probes: int
    available: bool
    message: str | None


def _preconditioner_quadratics(preconditioner: Factorization, z: np.ndarray,
                               n_params: int) -> np.ndarray:
    u = np.asarray(preconditioner.solve(z)).reshape(z.shape)
    out = np.empty((n_params, z.shape[1]))
    for i in range(n_params):
        pz = np.asarray(preconditioner.derivative_matvec(i, z)).reshape(z.shape)  # type: ignore[attr-defined]
        out[i] = np.sum(u * pz, axis=0)
    return out


def preconditioner_traces(preconditioner: Factorization, n_params: int, *, probes: int,
                          rng: np.random.Generator, batch: int = 16) -> PreconditionerTraces:
    """tr(P^-1 P_i) by Hutchinson with ``probes`` Rademacher probes."""
    zero = np.zeros(n_params)
    if not callable(getattr(preconditioner, "derivative_matvec", None)):
        return PreconditionerTraces(zero, zero, 0, False,
                                    "preconditioner has no derivative_matvec: score traces "
                                    "are plain Hutchinson estimates with exact products")
    n = int(preconditioner.n)
    samples = []
    try:
        for start in range(0, probes, batch):
            z = rademacher_probes(n, min(batch, probes - start), rng)
            samples.append(_preconditioner_quadratics(preconditioner, z, n_params))
    except Exception as exc:  # a plugin's optional member may refuse (size, kernel)
        return PreconditionerTraces(zero, zero, 0, False,
                                    f"preconditioner's derivative_matvec failed "
                                    f"({type(exc).__name__}: {exc}); score traces are plain "
                                    "Hutchinson estimates with exact products")
    values = np.concatenate(samples, axis=1)
    se = values.std(axis=1, ddof=1) / np.sqrt(values.shape[1]) if values.shape[1] > 1 \
        else np.full(n_params, np.inf)
    return PreconditionerTraces(values.mean(axis=1), se, values.shape[1], True, None)


def trace_difference_bounded(operator: KernelOperator, preconditioner: Factorization,
                             z: np.ndarray, sinv_z: np.ndarray, *, control: bool,
                             error_norms: np.ndarray
                             ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Per-probe z' Sigma^-1 Sigma_i z - z' P^-1 P_i z, the exact part z' Sigma^-1 Sigma_i z
    alone, and each value's CG error bound, all shape (p, count).

    ``sinv_z`` is Sigma^-1 z from CG; Sigma_i z are exact products. With
    ``control=False`` the second term is omitted. ``error_norms`` bounds
    ||sinv_z - Sigma^-1 z|| per probe (||r|| / lambda_min); then
    |z' Sigma_i (x - x*)| <= ||Sigma_i z|| ||x - x*|| (Cauchy-Schwarz).
    """
    exact = operator.derivative_matvecs(z)                    # (p, n, count)
    per_probe = np.einsum("nc,pnc->pc", sinv_z, exact)
    values = per_probe.copy()
    if control:
        values -= _preconditioner_quadratics(preconditioner, z, operator.n_params)
    bounds = np.linalg.norm(exact, axis=1) * np.asarray(error_norms)[None, :]
    return values, per_probe, bounds
