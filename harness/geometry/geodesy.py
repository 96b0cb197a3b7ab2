"""Longitude/latitude to chordal coordinates: points on a sphere embedded in 3D.

A point at longitude lambda and latitude phi (degrees) on a sphere of radius R is

    x = R cos(phi) cos(lambda),  y = R cos(phi) sin(lambda),  z = R sin(phi),

and the Euclidean (chordal) distance between two such points is
``2 R sin(delta / 2)`` for the great-circle angle delta. A covariance that is positive
definite in R^3 stays positive definite when restricted to the sphere, so every Matern
kernel is valid with chordal distance (Gneiting 2013, Bernoulli 19, "Strictly and
non-strictly positive definite functions on spheres", section 4). With great-circle
distance the Matern family is positive definite only for nu <= 1/2 (same paper,
Theorem 1 and Table 1), so covaudit offers chordal distance only.

Coordinates are scaled by the mean Earth radius in kilometres
(``EARTH_RADIUS_KM``, IUGG mean radius R1 = 6371.0088 km; Moritz 2000, "Geodetic
Reference System 1980", J. Geodesy 74), so length scales are chordal kilometres; for
separations well below the radius they equal great-circle kilometres to within
delta^2 / 24 relative error.
"""

from __future__ import annotations

import numpy as np

#: IUGG mean Earth radius R1 in kilometres.
EARTH_RADIUS_KM = 6371.0088


class CoordinateError(ValueError):
    """Longitude/latitude values outside their valid ranges."""


def check_lonlat(lon: np.ndarray, lat: np.ndarray, *, rows: np.ndarray | None = None) -> None:
    """Refuse latitudes outside [-90, 90] and longitudes outside [-360, 360].

    ``rows`` gives the 1-based file rows for the message (default: positions + 1).
    """
    lon = np.asarray(lon, dtype=float)
    lat = np.asarray(lat, dtype=float)
    rows = np.arange(1, lat.size + 1) if rows is None else np.asarray(rows)
    for name, values, limit in (("latitude", lat, 90.0), ("longitude", lon, 360.0)):
        bad = np.flatnonzero(np.abs(values) > limit)
        if bad.size:
            listed = ", ".join(f"row {int(rows[i])}: {values[i]:g}" for i in bad[:5])
            more = f" and {bad.size - 5} more" if bad.size > 5 else ""
            raise CoordinateError(
                f"{name} outside [-{limit:g}, {limit:g}] degrees ({listed}{more}); "
                "check the column order of --coords (longitude first, then latitude) "
                "or use --coord-system planar for projected coordinates")


def lonlat_to_chordal(lon: np.ndarray, lat: np.ndarray, *,
                      radius: float = EARTH_RADIUS_KM) -> np.ndarray:
    """Points on the sphere of ``radius`` in 3D, shape (n, 3) (module docstring)."""
    check_lonlat(lon, lat)
    lam = np.radians(np.asarray(lon, dtype=float))
    phi = np.radians(np.asarray(lat, dtype=float))
    cos_phi = np.cos(phi)
    return float(radius) * np.column_stack(
        [cos_phi * np.cos(lam), cos_phi * np.sin(lam), np.sin(phi)])


def chordal_distance(lon1: float, lat1: float, lon2: float, lat2: float, *,
                     radius: float = EARTH_RADIUS_KM) -> float:
    """2 R sin(delta / 2) from the haversine of the central angle delta."""
    p1, p2 = np.radians(lat1), np.radians(lat2)
    h = (np.sin((p2 - p1) / 2) ** 2
         + np.cos(p1) * np.cos(p2) * np.sin(np.radians(lon2 - lon1) / 2) ** 2)
    return float(2.0 * radius * np.sqrt(h))
