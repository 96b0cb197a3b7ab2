"""The exact MLE of points on a line, at any n: every step on the Kalman filter's exact
likelihood.

For 1D points and a half-integer Matern kernel (where the state-space reference applies)
the exact log-likelihood and its score cost O(n) (``fit_engines.StateSpaceEngine``), so
the fit needs neither the Vecchia approximation nor a refinement toward the exact MLE:

1. the starts screened by their exact log-likelihood, the best ``DENSE_FIT_STARTS`` kept;
2. L-BFGS-B from them with the exact score (``fitting.fit_mle``);
3. a Newton polish: the Fisher-scoring iteration (``fisher_steps.fisher_scoring``) with the
   observed information J = -dg/dtheta as its metric, to ``score_tol_se`` SE per
   parameter, SE from J.

The information the audit takes as its SE unit is J at the MLE (``StateSpaceEngine``:
Efron and Hinkley 1978 for J in place of the expected information).
"""

from __future__ import annotations

import math
import time
from collections.abc import Sequence
from dataclasses import replace

import numpy as np

from harness.check.fisher_steps import fisher_scoring
from harness.check.fit_engines import StateSpaceEngine
from harness.check.fit_records import MleFit
from harness.check.fitting import DENSE_FIT_STARTS, DENSE_SCORE_TOL_SE, fit_mle, screen_starts
from harness.model.kernels import Kernel


def fit_on_line(points: np.ndarray, y: np.ndarray, template: Kernel, *, mean: str,
                starts: Sequence[np.ndarray], bounds: Sequence[tuple[float, float]],
                max_iter: int = 200, max_steps: int = 20,
                score_tol_se: float = DENSE_SCORE_TOL_SE,
                time_budget: float = math.inf) -> MleFit:
    """The exact MLE on a line (module docstring). Past ``time_budget`` seconds each
    stage stops and the fit reports no convergence.

    Parameters
    ----------
    points : ndarray, shape (n, 1)
    y : ndarray, shape (n,)
    template : Kernel
        A half-integer Matern kernel with one length scale.
    mean : str
        ``zero``, ``constant`` or ``linear`` (GLS profile).
    starts, bounds : log-scale starting points and (low, high) per parameter.
    max_iter, max_steps : L-BFGS-B iterations, Newton steps of the polish.
    score_tol_se : float
        The polish's stopping rule, max_i |(J^-1 g)_i| / SE_i.
    """
    t0 = time.perf_counter()
    deadline = time.monotonic() + time_budget if math.isfinite(time_budget) else None
    engine = StateSpaceEngine(points, y, template, mean=mean)
    best = screen_starts(engine.loglik, starts, bounds, keep=DENSE_FIT_STARTS)
    first = fit_mle(engine, template, starts=best, bounds=bounds, max_iter=max_iter,
                    gtol=1e-8, deadline=deadline)
    polish = fisher_scoring(engine, template, first.theta, bounds=bounds,
                            max_steps=max_steps, step_tol_se=score_tol_se,
                            deadline=deadline)
    final = polish if polish.loglik >= first.loglik - 1e-8 else first
    notes = [*first.notes, *polish.notes]
    if engine.modified_at(polish.theta):
        notes.append("the observed information at the estimate was not positive definite "
                     "and was modified (eigenvalues replaced by their absolute values)")
    if not polish.converged:
        notes.append("exact fit on the line not converged: " + polish.starts[0].message)
    return replace(final, method="L-BFGS-B + Newton (Kalman filter, exact)",
                   engine="statespace", starts=(*first.starts, *polish.starts),
                   evaluations=first.evaluations + polish.evaluations + len(starts),
                   seconds=time.perf_counter() - t0, notes=tuple(notes),
                   fisher=polish.fisher, converged=polish.converged,
                   step_se=polish.step_se, score_tol_se=polish.score_tol_se,
                   accepted_steps=polish.accepted_steps)
