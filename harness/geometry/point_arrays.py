"""One point set as the (n, d) array of finite coordinates that geometry code works on."""

from __future__ import annotations

import numpy as np


def finite_points(points: np.ndarray, *, error: type[ValueError] = ValueError) -> np.ndarray:
    """Return ``points`` as a float (n, d) array with n >= 1, every coordinate finite.

    Parameters
    ----------
    points : array_like, shape (n, d) or (n,)
        Coordinates; a one-dimensional array is n points on a line.
    error : type of ValueError
        The exception raised for a bad array (a caller's own subclass, e.g. ``TreeError``).

    Raises
    ------
    ValueError
        Of type ``error``, naming the shape, or saying that a coordinate is not finite.
    """
    x = np.asarray(points, dtype=float)
    if x.ndim == 1:
        x = x[:, None]
    if x.ndim != 2 or x.shape[0] < 1:
        raise error(f"points: expected an (n, d) array with n >= 1, got shape {x.shape}")
    if not np.all(np.isfinite(x)):
        raise error("points: all coordinates must be finite")
    return x
