"""Errors of solves and kriging predictions."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True)
class SolveErrors:
    """Forward error ||x~ - x|| / ||x|| and the normwise relative backward error.

    The backward error of x~ for A x = b is ||b - A x~|| / (||A|| ||x~|| + ||b||)
    (Rigal and Gaches 1967; Higham 2002, *Accuracy and Stability of Numerical
    Algorithms*, Theorem 7.1), with ||A||_2 from the randomized estimate; ``residual``
    is ||b - A x~|| / ||b||.
    """

    forward: float
    residual: float
    backward: float

    def to_dict(self) -> dict[str, float]:
        return {"solve_forward_error": self.forward, "solve_residual": self.residual,
                "solve_backward_error": self.backward}


def solve_errors(x_approx: np.ndarray, x_exact: np.ndarray | None, residual: np.ndarray,
                 b: np.ndarray, norm_a: float) -> SolveErrors:
    """Errors of an approximate solve; ``residual`` = b - A x~ with the exact A."""
    xa = np.asarray(x_approx, dtype=float).ravel()
    rb = float(np.linalg.norm(residual))
    nb = float(np.linalg.norm(b))
    forward = float("nan")
    if x_exact is not None:
        xe = np.asarray(x_exact, dtype=float).ravel()
        forward = float(np.linalg.norm(xa - xe) / np.linalg.norm(xe))
    return SolveErrors(forward=forward, residual=rb / nb,
                       backward=rb / (norm_a * float(np.linalg.norm(xa)) + nb))


@dataclass(frozen=True)
class KrigingErrors:
    """Kriging mean error in units of the exact predictive SD, and variance relative error.

    mean_sd_i = |m~_i - m_i| / sqrt(v_i), var_rel_i = |v~_i - v_i| / v_i; reported as the
    maximum and root mean square over the held-out points.
    """

    mean_sd_max: float
    mean_sd_rms: float
    var_rel_max: float
    var_rel_rms: float
    points: int

    def to_dict(self) -> dict[str, float]:
        return {"kriging_mean_sd_max": self.mean_sd_max, "kriging_mean_sd_rms": self.mean_sd_rms,
                "kriging_var_rel_max": self.var_rel_max, "kriging_var_rel_rms": self.var_rel_rms,
                "kriging_points": self.points}


def kriging_errors(mean_approx: np.ndarray, var_approx: np.ndarray, mean_exact: np.ndarray,
                   var_exact: np.ndarray, *, floor: float = 0.0) -> KrigingErrors:
    """Compare predictions; exact variances are floored at ``floor`` (e.g. the nugget)
    to keep the ratios finite at observed locations of a noise-free model."""
    ma, va = np.ravel(mean_approx), np.ravel(var_approx)
    me, ve = np.ravel(mean_exact), np.maximum(np.ravel(var_exact), floor)
    if not (ma.shape == va.shape == me.shape == ve.shape):
        raise ValueError(f"kriging arrays disagree in shape: {ma.shape}, {va.shape}, "
                         f"{me.shape}, {ve.shape}")
    positive = ve > 0
    sd_err = np.abs(ma - me)[positive] / np.sqrt(ve[positive])
    var_rel = np.abs(va - ve)[positive] / ve[positive]
    if sd_err.size == 0:
        raise ValueError("every exact predictive variance is zero; no scale for the errors")
    return KrigingErrors(
        mean_sd_max=float(sd_err.max()), mean_sd_rms=float(np.sqrt(np.mean(sd_err ** 2))),
        var_rel_max=float(var_rel.max()), var_rel_rms=float(np.sqrt(np.mean(var_rel ** 2))),
        points=int(sd_err.size),
    )
