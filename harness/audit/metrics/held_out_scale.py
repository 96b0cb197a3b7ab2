"""Kriging mean errors in predictive standard deviations when only some held-out points
have a variance.

The audit predicts means at every held-out point (one solve) but variances only at a
subset V of them (one solve each; ``harness.likelihood.kriging``). The error at a point
i of V is |m~_i - m_i| / sqrt(v_i) with the reference's variance v_i, as before; a
point outside V is scaled by the smallest positive reference variance over V,
sqrt(min_V v), the largest error in SDs that the variances seen allow (common practice
for a conservative scale; it is exact when V holds every held-out point).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True)
class HeldOutScale:
    """Per held-out point, the predictive SD that scales its mean error.

    ``own`` is True where the point's own reference variance was computed.
    """

    sd: np.ndarray
    own: np.ndarray

    def errors(self, mean_approx: np.ndarray, mean_exact: np.ndarray) -> np.ndarray:
        """|m~ - m| / sd per held-out point."""
        diff = np.abs(np.ravel(mean_approx) - np.ravel(mean_exact))
        if diff.shape != self.sd.shape:
            raise ValueError(f"kriging means have {diff.size} entries, the scale "
                             f"{self.sd.size}")
        return diff / self.sd


def held_out_scale(m: int, var_exact: np.ndarray, variance_at: np.ndarray) -> HeldOutScale:
    """The scale of ``m`` held-out points from the reference variances ``var_exact`` at
    positions ``variance_at`` (module docstring).

    Raises
    ------
    ValueError
        When no reference variance is positive (no scale for the errors), or the two
        arrays disagree in length.
    """
    v = np.ravel(np.asarray(var_exact, dtype=float))
    at = np.ravel(np.asarray(variance_at, dtype=np.intp))
    if v.shape != at.shape:
        raise ValueError(f"{v.size} reference variances for {at.size} variance points")
    positive = np.isfinite(v) & (v > 0)
    if not np.any(positive):
        raise ValueError("every exact predictive variance is zero; no scale for the errors")
    floor = float(np.min(v[positive]))
    sd = np.full(m, np.sqrt(floor))
    own = np.zeros(m, dtype=bool)
    sd[at[positive]] = np.sqrt(v[positive])
    own[at[positive]] = True
    return HeldOutScale(sd=sd, own=own)
