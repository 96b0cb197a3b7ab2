"""The audit's own random draws, the same in ``check`` and in every ``run`` task.

From one seed the engine draws the kriging holdout (which points are held out and
predicted from the others) and the Rademacher probes of the difference-trace estimate,
each from its own child of ``numpy.random.default_rng(seed)``. ``check`` takes the seed
from ``--seed``, a grid task from its ``seed``; so the same data, seed and holdout size
give the same holdout and probes in both verbs.
"""

from __future__ import annotations

import numpy as np

from harness.infra.option_specs import HOLDOUT_FRACTION
from harness.likelihood.trace.probes import rademacher_probes

#: Child streams of ``default_rng(seed)``, in spawn order (``fit`` and ``growth`` are the
#: check's MLE and subsample streams).
AUDIT_STREAMS: tuple[str, ...] = ("split", "fit", "probes", "growth")
#: The fewest held-out points of a kriging evaluation.
MIN_HOLDOUT = 5


def audit_streams(seed: int) -> dict[str, np.random.Generator]:
    """The audit's random streams by name: one child of ``default_rng(seed)`` each."""
    children = np.random.default_rng(seed).spawn(len(AUDIT_STREAMS))
    return dict(zip(AUDIT_STREAMS, children, strict=True))


def holdout_size(n: int, fraction: float) -> int:
    """Held-out points for a fraction of ``n``: round(fraction n), at least ``MIN_HOLDOUT``.

    Raises
    ------
    ValueError
        When ``fraction`` is outside ``HOLDOUT_FRACTION``'s range (the core message).
    """
    if (core := HOLDOUT_FRACTION.problem(fraction)) is not None:
        raise ValueError(core)
    return max(MIN_HOLDOUT, int(round(fraction * n)))


def split_points(n: int, size: int, rng: np.random.Generator
                 ) -> tuple[np.ndarray, np.ndarray]:
    """Random (conditioning, holdout) index arrays with ``size`` held-out points."""
    perm = rng.permutation(n)
    return np.sort(perm[size:]), np.sort(perm[:size])


def audit_draws(n: int, *, holdout: int, probes: int, seed: int
                ) -> tuple[np.ndarray, np.ndarray]:
    """The holdout indices and the (n, probes) Rademacher probes for ``seed``."""
    streams = audit_streams(seed)
    _, hold = split_points(n, holdout, streams["split"])
    return hold, rademacher_probes(n, probes, streams["probes"])
