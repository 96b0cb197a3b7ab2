"""Mean models: the regression design matrix F of y = F beta + e, e ~ N(0, Sigma).

``zero`` has no columns, ``constant`` one column of ones (ordinary kriging), ``linear``
ones plus the coordinates (universal kriging with a linear trend; Cressie 1993,
*Statistics for Spatial Data*, section 3.4).
"""

from __future__ import annotations

import numpy as np

MEAN_MODELS = ("zero", "constant", "linear")


def design_matrix(points: np.ndarray, mean: str) -> np.ndarray:
    """F, shape (n, p_mean): p_mean = 0, 1 or 1 + d for ``zero``, ``constant``, ``linear``."""
    points = np.asarray(points, dtype=float)
    if points.ndim == 1:
        points = points[:, None]
    n = points.shape[0]
    if mean == "zero":
        return np.empty((n, 0))
    if mean == "constant":
        return np.ones((n, 1))
    if mean == "linear":
        return np.hstack([np.ones((n, 1)), points])
    raise ValueError(f"unknown mean model {mean!r}; known: {', '.join(MEAN_MODELS)}")
