"""Warnings for coordinates whose spread is near the limit of double precision.

Distances are computed as differences of coordinates, each rounded to about
eps * |x| (eps = 2^-52, IEEE 754 double precision). Along an axis with spread
s = max - min and magnitude m = max |x|, the relative error of a difference is about
eps * m / s, so fewer than ``MIN_DIGITS`` significant digits remain when
eps * m / s > 10^-MIN_DIGITS (points far from the origin, e.g. unprojected coordinates
with an offset). Independently, when the whole spread is a tiny fraction of the length
scale every correlation rounds to 1 and Sigma to a constant plus the nugget. The limits
are common practice chosen here, not a published standard.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

#: Significant digits of coordinate differences below which a warning is given.
MIN_DIGITS = 6
#: Spread / length scale below which every correlation is within ~1e-12 of 1.
MIN_SPREAD_TO_LENGTHSCALE = 1e-6


def spread_warnings(points: np.ndarray, lengthscale: Sequence[float] | float | None = None
                    ) -> list[str]:
    """Messages for axes whose coordinate spread is near double precision's limit.

    Parameters
    ----------
    points : (n, d) array
    lengthscale : float or sequence of float, optional
        The kernel's length scale(s); adds the spread-to-length-scale check.
    """
    x = np.asarray(points, dtype=float)
    if x.ndim != 2 or x.shape[0] < 2:
        return []
    eps = np.finfo(float).eps
    out: list[str] = []
    scales = (np.broadcast_to(np.asarray(lengthscale, dtype=float).ravel(), (x.shape[1],))
              if lengthscale is not None and np.size(lengthscale) in (1, x.shape[1]) else None)
    for k in range(x.shape[1]):
        column = x[:, k][np.isfinite(x[:, k])]
        if column.size < 2:
            continue
        spread = float(column.max() - column.min())
        magnitude = float(np.abs(column).max())
        if spread == 0.0:
            out.append(f"coordinate {k + 1}: every point has the same value "
                       f"({column[0]:.17g}); distances along it are all zero")
            continue
        digits = -np.log10(eps * magnitude / spread) if magnitude > 0 else np.inf
        if digits < MIN_DIGITS:
            out.append(f"coordinate {k + 1}: spread {spread:.3g} against magnitude "
                       f"{magnitude:.3g} leaves about {max(digits, 0):.1f} significant digits "
                       "in distances (double precision); subtract an offset or rescale "
                       "the coordinates")
        if scales is not None and spread / scales[k] < MIN_SPREAD_TO_LENGTHSCALE:
            out.append(f"coordinate {k + 1}: spread {spread:.3g} is {spread / scales[k]:.2g} "
                       f"of the length scale {scales[k]:.3g}; every correlation rounds to "
                       "1 in double precision; rescale the coordinates or the length scale")
    return out
