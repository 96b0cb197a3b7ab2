"""Errors of stochastic trace estimates against exact traces, with z-scores."""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True)
class TraceErrors:
    """Estimated minus exact tr(Sigma^-1 Sigma_i), relative errors, and z-scores.

    The z-score is error / (the estimator's own standard error); for an unbiased
    estimator with a calibrated standard error it is about N(0, 1) (Hutchinson 1990,
    Comm. Statist. Simul. Comput. 19; Meyer et al. 2021, SOSA, "Hutch++"). |z| >> 3
    flags a biased estimate or a standard error that is too small.
    """

    param_names: tuple[str, ...]
    error: np.ndarray
    relative: np.ndarray
    z: np.ndarray

    def to_dict(self) -> dict[str, float]:
        finite_z = self.z[np.isfinite(self.z)]
        out = {"trace_rel_error_max": float(np.max(self.relative)),
               "trace_z_max": float(np.max(np.abs(finite_z))) if finite_z.size else math.nan}
        for i, name in enumerate(self.param_names):
            out[f"trace_error[{name}]"] = float(self.error[i])
            out[f"trace_z[{name}]"] = float(self.z[i])
        return out


def trace_errors(estimate: np.ndarray, exact: np.ndarray, stderr: np.ndarray | None,
                 param_names: Sequence[str]) -> TraceErrors:
    """Compare trace estimates with exact values; z is NaN where no standard error is given
    or it is zero (an exact trace)."""
    est = np.asarray(estimate, dtype=float).ravel()
    ref = np.asarray(exact, dtype=float).ravel()
    if est.shape != ref.shape:
        raise ValueError(f"trace estimate has shape {est.shape}, exact traces {ref.shape}")
    err = est - ref
    scale = np.where(ref != 0, np.abs(ref), np.nan)
    if stderr is None:
        z = np.full(err.shape, math.nan)
    else:
        se = np.asarray(stderr, dtype=float).ravel()
        with np.errstate(divide="ignore", invalid="ignore"):
            z = np.where(se > 0, err / se, math.nan)
    return TraceErrors(param_names=tuple(param_names), error=err,
                       relative=np.abs(err) / scale, z=z)
