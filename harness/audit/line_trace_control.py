"""Shared probes for the Kalman reference: the exact Sigma^-1 Sigma_i on the audit's probes.

Against the state-space (Kalman) reference the solver under test has no exact
factorization to share probes with, so its trace terms were estimated on their own
(Hutch++, 64 probes); in SE units that noise is about one SE whatever n, and it left
the parameter shift unresolved on 100,000 points on a line. Here the exact side of
common random numbers (``harness.audit.sides`` does the same against the dense
reference) is computed without a dense matrix, once per audit, for the shared probe
columns Z (``AuditData.probes``), and handed to every knob value and solver seed as a
``harness.likelihood.trace.control.TraceControl`` with B_i = Sigma^-1 Sigma_i:

* tr(Sigma^-1 Sigma_i) exactly, from the Kalman score of zero data: with y = 0 the
  score is g_i = -1/2 tr(Sigma^-1 Sigma_i) (Rasmussen and Williams 2006, eq. 5.9);
* Sigma_i Z exactly in O(n) per column (``harness.references.line_products``);
* X = Sigma^-1 Z by preconditioned CG with those exact products and the Vecchia factor
  (``VECCHIA_NEIGHBOURS``) as preconditioner (``harness.references.operator.pcg``);
* w_ij = x_j' Sigma_i z_j, with the bound |w_ij - z_j' Sigma^-1 Sigma_i z_j| <=
  ||Sigma_i z_j|| ||r_j|| / lambda_min (Cauchy-Schwarz; lambda_min >= the nugget,
  Weyl), averaged over j into the control's ``bound``. Rigorous with a nugget; without
  one no control is built.
"""

from __future__ import annotations

import time

import numpy as np

from harness.likelihood.trace.control import TraceControl
from harness.model.kernels import Kernel

#: Nearest earlier points of the CG preconditioner's Vecchia factor (the fit's tight
#: setting, ``harness.check.vecchia_fit.FIT_NEIGHBOURS``).
VECCHIA_NEIGHBOURS = 40
#: CG stops a column at ||r|| <= CG_RTOL ||z||.
CG_RTOL = 1e-11
CG_MAX_ITERATIONS = 2000


def line_trace_control(points: np.ndarray, kernel: Kernel, probes: np.ndarray
                       ) -> tuple[TraceControl | None, str]:
    """The exact control on ``probes`` for points on a line (module docstring), with a
    note; (None, reason) when it cannot be built (no nugget, a kernel the line products
    do not cover, fewer than 2 probes, CG not converged)."""
    from harness.references.line_products import LineProductError, LineProducts
    from harness.references.operator.pcg import PreconditionerError, pcg
    from harness.references.statespace import StateSpaceReference
    from harness.solvers.vecchia.factorization import factorize

    z = np.asarray(probes, dtype=float)
    if z.ndim != 2 or z.shape[1] < 2:
        return None, "no shared-probe control: fewer than 2 probe columns"
    if not kernel.nugget > 0:
        return None, ("no shared-probe control: without a nugget the CG error has no "
                      "rigorous bound")
    t0 = time.perf_counter()
    try:
        products = LineProducts(points, kernel)
        zero = np.zeros(products.n)
        traces = -2.0 * np.asarray(StateSpaceReference(points, kernel).evaluate(
            zero, mean="zero", score=True).score, dtype=float)
        neighbours = int(min(VECCHIA_NEIGHBOURS, products.n - 1))
        preconditioner = factorize(points, kernel, neighbours=neighbours)
        solved = pcg(products.matvec, z, precondition=preconditioner.solve, rtol=CG_RTOL,
                     max_iterations=CG_MAX_ITERATIONS, lambda_min=float(kernel.nugget))
    except (LineProductError, PreconditionerError, ValueError,
            np.linalg.LinAlgError) as exc:
        return None, f"no shared-probe control ({exc})"
    if not solved.converged:
        return None, (f"no shared-probe control: CG did not converge in {solved.iterations} "
                      f"iterations (largest relative residual "
                      f"{float(np.max(solved.relative_residual)):.2g})")
    residual = (np.asarray(solved.residual) if solved.residual is not None
                else z - products.matvec(solved.x))
    error_norms = np.linalg.norm(residual, axis=0) / float(kernel.nugget)
    per_probe = np.empty((kernel.n_params, z.shape[1]))
    bound = np.empty(kernel.n_params)
    for i in range(kernel.n_params):
        derivative = products.derivative_matvec(i, z)
        per_probe[i] = np.einsum("nk,nk->k", solved.x, derivative)
        bound[i] = float(np.mean(np.linalg.norm(derivative, axis=0) * error_norms))
    seconds = time.perf_counter() - t0
    source = ("the exact Sigma^-1 Sigma_i (Kalman traces; CG with exact O(n) products, "
              f"{solved.iterations} iterations)")
    control = TraceControl(probes=z, exact=traces, per_probe=per_probe, bound=bound,
                           source=source)
    return control, (f"shared-probe control: {source}, {z.shape[1]} probes, "
                     f"{seconds:.1f} s")
