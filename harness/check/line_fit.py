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
from collections.abc import Sequence
from dataclasses import replace

import numpy as np

from harness.check.fit_engines import StateSpaceEngine
from harness.check.fit_records import MleFit
from harness.check.fitting import DENSE_SCORE_TOL_SE, screened_fit
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
    engine = StateSpaceEngine(points, y, template, mean=mean)
    fit = screened_fit(engine, engine.loglik, template, starts=starts, bounds=bounds,
                       max_iter=max_iter, max_steps=max_steps, score_tol_se=score_tol_se,
                       time_budget=time_budget,
                       method="L-BFGS-B + Newton (Kalman filter, exact)",
                       what="exact fit on the line")
    if not engine.modified_at(fit.theta):
        return fit
    return replace(fit, notes=(*fit.notes, "the observed information at the estimate was not "
                               "positive definite and was modified (eigenvalues replaced by "
                               "their absolute values)"))
