"""Score traces tr(Sigma^-1 Sigma_i) as the preconditioner's trace plus an exact correction.

With C the preconditioner (the control variate) and C_i its derivative products
(``derivative_matvec``),

    tr(Sigma^-1 Sigma_i) = tr(C^-1 C_i) + tr(Sigma^-1 Sigma_i - C^-1 C_i).

The second term is a Hutchinson estimate, E[z' A z] = tr(A) for Rademacher z
(Hutchinson 1990, Commun. Statist. Simul. 19(2)), with exact products Sigma_i z and CG
solves Sigma^-1 z. Since Sigma ~ C and Sigma_i ~ C_i, the per-probe differences are
small, and so is their sample spread. The first term is exact where C offers
``derivative_traces`` (the Vecchia factor: d log det C / dtheta_i in O(n)) and then has
no variance; otherwise it is a Hutchinson estimate with many probes at C's low cost,
whose variance is the plain estimator's, 2 sum_{j != k} S_jk^2 / probes for S the
symmetric part of C^-1 C_i (Hutchinson 1990), and dominates when C is accurate. The
standard error of each estimate is its sample standard deviation over sqrt(probes); the
two are independent, so their variances add. Without ``derivative_matvec`` the first term is
dropped and the second is the plain estimate of tr(Sigma^-1 Sigma_i).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from harness.linalg.rademacher import rademacher_probes
from harness.references.operator.products import KernelOperator
from harness.solvers.protocol import Factorization


@dataclass(frozen=True)
class ControlTraces:
    """tr(C^-1 C_i) with its standard error (zeros if unavailable); ``exact`` when it
    came from the control's ``derivative_traces`` (SE 0, no probes)."""

    estimate: np.ndarray
    se: np.ndarray
    probes: int
    available: bool
    message: str | None
    exact: bool = False

    def describe(self) -> str:
        """How the traces were taken: "exact", "N probes", or "none" (no control)."""
        if self.exact:
            return "exact"
        return f"{self.probes} probes" if self.available else "none"


def _control_quadratics(control: Factorization, z: np.ndarray, n_params: int) -> np.ndarray:
    """Per probe z' C^-1 C_i z, shape (p, count)."""
    u = np.asarray(control.solve(z)).reshape(z.shape)
    out = np.empty((n_params, z.shape[1]))
    for i in range(n_params):
        cz = np.asarray(control.derivative_matvec(i, z)).reshape(z.shape)  # type: ignore[attr-defined]
        out[i] = np.sum(u * cz, axis=0)
    return out


def control_traces(control: Factorization, n_params: int, *, probes: int,
                   rng: np.random.Generator, batch: int = 16) -> ControlTraces:
    """tr(C^-1 C_i) of the ``control``: exact from its ``derivative_traces`` where it has
    them (and they are finite), else by Hutchinson with ``probes`` Rademacher probes."""
    zero = np.zeros(n_params)
    if not callable(getattr(control, "derivative_matvec", None)):
        return ControlTraces(zero, zero, 0, False,
                             "the trace control has no derivative_matvec: score traces are "
                             "plain Hutchinson estimates with exact products")
    exact = _exact_traces(control, n_params)
    if exact is not None:
        return ControlTraces(exact, zero, 0, True, None, exact=True)
    n = int(control.n)
    samples = []
    try:
        for start in range(0, probes, batch):
            z = rademacher_probes(n, min(batch, probes - start), rng)
            samples.append(_control_quadratics(control, z, n_params))
    except Exception as exc:  # a plugin's optional member may refuse (size, kernel)
        return ControlTraces(zero, zero, 0, False,
                             f"the trace control's derivative_matvec failed "
                             f"({type(exc).__name__}: {exc}); score traces are plain "
                             "Hutchinson estimates with exact products")
    values = np.concatenate(samples, axis=1)
    se = values.std(axis=1, ddof=1) / np.sqrt(values.shape[1]) if values.shape[1] > 1 \
        else np.full(n_params, np.inf)
    return ControlTraces(values.mean(axis=1), se, values.shape[1], True, None)


def _exact_traces(control: Factorization, n_params: int) -> np.ndarray | None:
    """The control's exact traces, or None where it has none (or they fail or are not
    finite: the probed estimate is then taken)."""
    member = getattr(control, "derivative_traces", None)
    if not callable(member):
        return None
    try:
        values = np.asarray(member(), dtype=float).reshape(n_params)
    except Exception:  # a plugin's optional member may refuse; probing still works
        return None
    return values if np.all(np.isfinite(values)) else None


def trace_difference_bounded(operator: KernelOperator, control: Factorization,
                             z: np.ndarray, sinv_z: np.ndarray, *, use_control: bool,
                             error_norms: np.ndarray
                             ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Per-probe z' Sigma^-1 Sigma_i z - z' C^-1 C_i z, the exact part z' Sigma^-1 Sigma_i z
    alone, and each value's CG error bound, all shape (p, count).

    ``sinv_z`` is Sigma^-1 z from CG; Sigma_i z are exact products. With
    ``use_control=False`` the second term is omitted. ``error_norms`` bounds
    ||sinv_z - Sigma^-1 z|| per probe (||r|| / lambda_min); then
    |z' Sigma_i (x - x*)| <= ||Sigma_i z|| ||x - x*|| (Cauchy-Schwarz).
    """
    exact = operator.derivative_matvecs(z)                    # (p, n, count)
    per_probe = np.einsum("nc,pnc->pc", sinv_z, exact)
    values = per_probe.copy()
    if use_control:
        values -= _control_quadratics(control, z, operator.n_params)
    bounds = np.linalg.norm(exact, axis=1) * np.asarray(error_norms)[None, :]
    return values, per_probe, bounds
