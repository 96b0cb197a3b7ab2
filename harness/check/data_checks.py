"""Validation of a dataset before a check: enough points, varying values, distinct
locations, valid longitude/latitude.

Every refusal is a ``CheckDataError`` whose message names what was seen (row numbers
of the file, counts, values) and what to do.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from harness.geometry.geodesy import CoordinateError, check_lonlat, lonlat_to_chordal
from harness.infra.data_files import Observations

#: Fewest observations a check accepts: with fewer, the Fisher information of 3-4
#: covariance parameters is too poorly determined for SE-scaled metrics (covaudit's
#: own limit, common practice for variogram fitting is 30-50 pairs per lag).
MIN_POINTS = 30
COORD_SYSTEMS = ("planar", "lonlat")
_LISTED = 5


class CheckDataError(ValueError):
    """The data cannot be checked as given."""


@dataclass(frozen=True)
class ValidatedData:
    """Observations ready for the check.

    Attributes
    ----------
    points : ndarray, shape (n, d)
        Model coordinates (chordal km in 3D for ``lonlat``).
    values : ndarray, shape (n,)
    rows : ndarray
        1-based file rows (the first row of each group when duplicates were averaged).
    coord_system : str
    duplicates_averaged : int
        Rows merged into others by averaging duplicate locations.
    notes : tuple of str
    """

    points: np.ndarray
    values: np.ndarray
    rows: np.ndarray
    coord_system: str
    duplicates_averaged: int
    notes: tuple[str, ...]

    @property
    def n(self) -> int:
        return int(self.values.size)

    def to_dict(self) -> dict[str, object]:
        return {"n": self.n, "d": int(self.points.shape[1]), "coord_system": self.coord_system,
                "duplicates_averaged": self.duplicates_averaged, "notes": list(self.notes)}


def _duplicate_groups(points: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Unique locations, the group index of every row, and the group sizes."""
    unique, inverse, counts = np.unique(points, axis=0, return_inverse=True,
                                        return_counts=True)
    return unique, inverse.ravel(), counts


def validate(obs: Observations, *, coord_system: str = "planar",
             average_duplicates: bool = False, min_points: int = MIN_POINTS
             ) -> ValidatedData:
    """Check ``obs`` and return model coordinates (see module docstring).

    Raises
    ------
    CheckDataError
        Too few points, all values equal, duplicate locations (unless
        ``average_duplicates``), latitude outside [-90, 90] for ``lonlat``.
    """
    if coord_system not in COORD_SYSTEMS:
        raise CheckDataError(f"--coord-system: expected one of {', '.join(COORD_SYSTEMS)}, "
                             f"got {coord_system!r}")
    points, values, rows = obs.points, obs.values, obs.rows
    notes: list[str] = []
    if coord_system == "lonlat":
        if points.shape[1] != 2:
            raise CheckDataError(f"--coord-system lonlat needs two coordinate columns "
                                 f"(longitude, latitude), got {points.shape[1]}: "
                                 f"{', '.join(obs.coords)}")
        try:
            check_lonlat(points[:, 0], points[:, 1], rows=rows)
        except CoordinateError as exc:
            raise CheckDataError(f"{obs.source}: {exc}") from None
    _, group, counts = _duplicate_groups(points)
    merged = 0
    if np.any(counts > 1):
        dup_rows = rows[counts[group] > 1]
        n_groups = int(np.sum(counts > 1))
        listed = ", ".join(str(int(r)) for r in dup_rows[:_LISTED])
        more = f" and {dup_rows.size - _LISTED} more" if dup_rows.size > _LISTED else ""
        if not average_duplicates:
            raise CheckDataError(
                f"{obs.source}: {n_groups} location(s) appear more than once (rows {listed}"
                f"{more}); the model needs distinct locations: pass --average-duplicates to "
                "average the values at each location, or remove the duplicates")
        sums = np.bincount(group, weights=values)
        first = np.full(counts.size, rows.size)
        np.minimum.at(first, group, np.arange(rows.size))
        order = np.argsort(first)
        points = points[first[order]]
        values = (sums / counts)[order]
        rows = rows[first[order]]
        merged = int(np.sum(counts - 1))
        notes.append(f"{merged} duplicate row(s) averaged into {n_groups} location(s) "
                     f"(rows {listed}{more})")
    if values.size < min_points:
        raise CheckDataError(
            f"{obs.source}: only {values.size} usable observation(s); a check needs at least "
            f"{min_points} to estimate the covariance parameters and their standard errors")
    spread = float(np.ptp(values))
    if spread == 0.0 or spread <= 1e-12 * max(1.0, float(np.max(np.abs(values)))):
        raise CheckDataError(
            f"{obs.source}: column {obs.value!r} has the same value ({values[0]:g}) in every "
            "row; a constant field has no covariance to fit")
    if coord_system == "lonlat":
        points = lonlat_to_chordal(points[:, 0], points[:, 1])
        notes.append("longitude/latitude embedded on the sphere of radius 6371.0088 km; "
                     "distances are chordal km (Matern valid for every nu; Gneiting 2013)")
    return ValidatedData(points=np.ascontiguousarray(points, dtype=float),
                         values=np.asarray(values, dtype=float), rows=np.asarray(rows),
                         coord_system=coord_system, duplicates_averaged=merged,
                         notes=tuple(notes))
