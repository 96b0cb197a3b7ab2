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
* w_ij = (W^-1 z_j)' (W^-1 Sigma_i z_j) = z_j' Sigma^-1 Sigma_i z_j, with Sigma = W W'
  the filter's prediction-error decomposition and W^-1 its innovation pass
  (``StateSpaceReference.whiten``), O(n) per column and exact up to rounding. The
  control's ``bound`` is the final dots' rounding, gamma_n sum_l |u_l| |v_l| (Higham
  2002, *Accuracy and Stability of Numerical Algorithms*, eq. 3.5), averaged over the
  probes; the filter's own rounding is not in it (against dense Cholesky it stays near
  1e-13 relative, ``tests/test_trace_control.py``). The dots stay numpy sums: correctly
  rounded ones (``harness.references.operator.rounding.accurate_dots``) cost 0.2 s per
  parameter at 100,000 points x 16 probes, for a bound far below the probes' noise.

Without a nugget the filter still whitens distinct points; repeated coordinates then make
Sigma singular, and no control is built.
"""

from __future__ import annotations

import time

import numpy as np

from harness.likelihood.trace.control import TraceControl
from harness.model.kernels import Kernel
from harness.references.operator.rounding import UNIT_ROUNDOFF


def line_trace_control(points: np.ndarray, kernel: Kernel, probes: np.ndarray
                       ) -> tuple[TraceControl | None, str]:
    """The exact control on ``probes`` for points on a line (module docstring), with a
    note; (None, reason) when it cannot be built (a kernel the line products or the
    filter do not cover, a singular Sigma, fewer than 2 probes)."""
    from harness.references.line_products import LineProductError, LineProducts
    from harness.references.statespace import StateSpaceReference

    z = np.asarray(probes, dtype=float)
    if z.ndim != 2 or z.shape[1] < 2:
        return None, "no shared-probe control: fewer than 2 probe columns"
    t0 = time.perf_counter()
    try:
        products = LineProducts(points, kernel)
        reference = StateSpaceReference(points, kernel)
        traces = -2.0 * np.asarray(reference.evaluate(
            np.zeros(products.n), mean="zero", score=True).score, dtype=float)
        white_z = reference.whiten(z)
        per_probe = np.empty((kernel.n_params, z.shape[1]))
        bound = np.empty(kernel.n_params)
        gamma = products.n * UNIT_ROUNDOFF / (1.0 - products.n * UNIT_ROUNDOFF)
        for i in range(kernel.n_params):
            white_d = reference.whiten(products.derivative_matvec(i, z))
            per_probe[i] = np.einsum("nk,nk->k", white_z, white_d)
            bound[i] = gamma * float(np.mean(np.einsum("nk,nk->k", np.abs(white_z),
                                                       np.abs(white_d))))
    except (LineProductError, ValueError, np.linalg.LinAlgError) as exc:
        return None, f"no shared-probe control ({exc})"
    seconds = time.perf_counter() - t0
    source = ("the exact Sigma^-1 Sigma_i (Kalman traces; exact O(n) products whitened by "
              "the Kalman filter)")
    control = TraceControl(probes=z, exact=traces, per_probe=per_probe, bound=bound,
                           source=source)
    return control, (f"shared-probe control: {source}, {z.shape[1]} probes, "
                     f"{seconds:.1f} s")
