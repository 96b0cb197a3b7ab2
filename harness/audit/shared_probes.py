"""The solver's score error against a value reference, on shared probes where offered.

The score error e = g~ - g decides the parameter shift
(``harness.audit.tolerance_metrics.shift_metrics``). With g~_i = 1/2 q~_i - 1/2 T~_i and
g_i = 1/2 q_i - 1/2 T_i (Rasmussen and Williams 2006, eq. 5.9; q the quadratic terms,
T the trace terms) there are two estimates of e:

* on its own (``own_score_error``): the solver's Hutch++ traces against the reference's
  score; its uncertainty adds the reference's score uncertainty and the solver's probe
  SE (independent probes). In SE units of the parameters that noise does not shrink
  with n: about 1 SE at 64 probes, which left every tolerance unresolved on 100,000
  points on a line;
* on shared probes (``shared_score_error``), where the reference offers a
  ``TraceControl`` (its exact side on probe columns Z: the Kalman reference's,
  ``harness.audit.line_trace_control``, or the exact operator's own score probes): the
  trace difference is the mean of z_j' S~_i z_j - z_j' S_i z_j on the same Z (common
  random numbers, as against the dense reference in ``harness.audit.sides``), so its
  noise is that of the compression error alone:

      e_shared = 1/2 (q~ - q) - 1/2 mean_j d_ij,   q = 2 g + T_control,

  with the SE of the control (``harness.likelihood.trace.control``) and the part of the
  reference's score uncertainty that does not come from its trace probes
  (``ReferenceValues.score_se_shared``). The same Z serves every knob value and seed.

The shared estimate comes first. Its variance grows with the solver's error, so at a
loose knob value it can be the weaker one; when its shift SE exceeds ``SHARP_ENOUGH``
of the shift limit, the estimate on its own is made as well and the two are merged
(``merge``). Against the Kalman reference, whose traces are exact, the two use
independent probes and are combined by inverse-variance weights
(``combine_estimates``); against the exact operator, whose traces were estimated on the
same Z, they are correlated and the sharper one is taken per parameter.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from harness.likelihood.trace.control import (
    TraceControl,
    combine_estimates,
    controlled_traces,
)
from harness.model import design_matrix
from harness.model.kernels import Kernel

#: Make the solver's own Hutch++ estimate too when the shared estimate's parameter-shift
#: SE is above this fraction of the shift limit (its 2 SE then still fit 1/5 of the
#: limit; common practice for a resolution margin, no source).
SHARP_ENOUGH = 0.1


@dataclass(frozen=True)
class ScoreError:
    """e = g~ - g with a per-component SE and how it was estimated."""

    error: np.ndarray
    stderr: np.ndarray
    note: str


def own_score_error(solver_score: np.ndarray, solver_trace_se: np.ndarray | None,
                    reference_score: np.ndarray, reference_score_se: np.ndarray
                    ) -> ScoreError:
    """The solver's own estimate against the reference's score (module docstring)."""
    solver_se = (np.zeros_like(reference_score_se) if solver_trace_se is None
                 else 0.5 * np.asarray(solver_trace_se, dtype=float))
    return ScoreError(np.asarray(solver_score, dtype=float) - reference_score,
                      np.sqrt(np.asarray(reference_score_se) ** 2 + solver_se ** 2),
                      "the solver's traces estimated on their own (Hutch++)")


def solver_quadratics(fac: object, points: np.ndarray, y: np.ndarray, kernel: Kernel, *,
                      mean: str, beta: np.ndarray) -> np.ndarray:
    """q~_i = a' Sigma~_i a with a = Sigma~^-1 (y - F beta) (Rasmussen and Williams 2006,
    eq. 5.9), from the factorization's solve and derivative products."""
    design = design_matrix(points, mean)
    a = np.asarray(getattr(fac, "solve")(y - design @ beta))  # noqa: B009
    derivative = getattr(fac, "derivative_matvec")  # noqa: B009
    return np.array([float(a @ np.asarray(derivative(i, a))) for i in range(kernel.n_params)])


def shared_score_error(fac: object, quadratics: np.ndarray, reference_score: np.ndarray,
                       control: TraceControl, score_se_shared: np.ndarray | None
                       ) -> ScoreError:
    """The estimate on the control's probes (module docstring)."""
    p = quadratics.size
    controlled = controlled_traces(fac, p, control)
    reference_quadratics = 2.0 * np.asarray(reference_score, dtype=float) + control.exact
    error = (0.5 * (quadratics - reference_quadratics)
             - 0.5 * (controlled.traces - control.exact))
    other = np.zeros(p) if score_se_shared is None else np.asarray(score_se_shared)
    return ScoreError(error, np.sqrt(other ** 2 + (0.5 * controlled.stderr) ** 2),
                      f"the solver's traces on {controlled.probes} probes shared with "
                      f"{control.source}")


def merge(shared: ScoreError, own: ScoreError, control: TraceControl) -> ScoreError:
    """Both estimates in one (module docstring): inverse-variance weights when the
    control's traces are known, the sharper one per parameter when they were estimated
    on the same probes."""
    if not control.estimated_on_probes:
        error, stderr = combine_estimates(shared.error, shared.stderr, own.error,
                                          own.stderr)
        return ScoreError(error, stderr, f"{shared.note}, combined with {own.note} by "
                                         "inverse-variance weights")
    sharper = shared.stderr <= own.stderr
    return ScoreError(np.where(sharper, shared.error, own.error),
                      np.where(sharper, shared.stderr, own.stderr),
                      f"per parameter the sharper of {shared.note} and {own.note}")
