"""The audit's own random draws, the same in ``check`` and in every ``run`` task.

From one seed the engine draws the kriging holdout (which points are held out and
predicted from the others) and the Rademacher probes of the difference-trace estimate,
each from its own child of ``numpy.random.default_rng(seed)``. ``check`` takes the seed
from ``--seed``, a grid task from its ``seed``; so the same data, seed and holdout size
give the same holdout and probes in both verbs.

Sizes. The holdout is round(fraction n) points, at least ``MIN_HOLDOUT``, at most
``--holdout-points`` (2,000 by default): means there cost one product each with a
cross-covariance column. Variances cost one solve each, so they are computed at a
seeded subset of at most ``--variance-points`` (256) held-out points
(``variance_positions``), drawn from its own stream: the child of the seed after the
``AUDIT_STREAMS``, so adding it changed none of their draws.
"""

from __future__ import annotations

import numpy as np

from harness.infra.option_specs import HOLDOUT_FRACTION, HOLDOUT_POINTS, VARIANCE_POINTS
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


#: The stream of the variance subset: spawn key after those of ``AUDIT_STREAMS``.
VARIANCE_STREAM_KEY = len(AUDIT_STREAMS)


class HoldoutSizeError(ValueError):
    """A holdout size the data cannot give; ``option`` names the option at fault."""

    def __init__(self, option: str, core: str) -> None:
        super().__init__(core)
        self.option = option


def holdout_size(n: int, fraction: float, *, cap: int | None = None) -> int:
    """Held-out points for a fraction of ``n``: round(fraction n), at least ``MIN_HOLDOUT``,
    at most ``cap`` (None: ``HOLDOUT_POINTS``' default).

    Raises
    ------
    HoldoutSizeError
        When ``fraction`` or ``cap`` is outside its option's range (the core message), a
        given ``cap`` is not below ``n``, or the holdout would leave no conditioning point.
    """
    if (core := HOLDOUT_FRACTION.problem(fraction)) is not None:
        raise HoldoutSizeError("holdout", core)
    if cap is not None and (core := HOLDOUT_POINTS.problem(cap)) is not None:
        raise HoldoutSizeError("holdout_points", core)
    if cap is not None and cap >= n:
        raise HoldoutSizeError("holdout_points", f"expected fewer held-out points than the "
                                                 f"{n:,} data points, got {cap:,}")
    limit = HOLDOUT_POINTS.default if cap is None else cap
    size = min(max(MIN_HOLDOUT, int(round(fraction * n))), limit)
    if size >= n:
        raise HoldoutSizeError("holdout", f"{size:,} held-out points of {n:,} leave no point "
                                          f"to condition on (fraction {fraction:g})")
    return size


def variance_positions(m: int, count: int = VARIANCE_POINTS.default, *, seed: int
                       ) -> np.ndarray:
    """Sorted positions among ``m`` held-out points that get a kriging variance: all of
    them when ``count >= m``, else ``count`` drawn without replacement from the seed's
    variance stream (module docstring).

    Raises
    ------
    HoldoutSizeError
        When ``count`` is outside ``VARIANCE_POINTS``'s range.
    """
    if (core := VARIANCE_POINTS.problem(count)) is not None:
        raise HoldoutSizeError("variance_points", core)
    if count >= m:
        return np.arange(m)
    stream = np.random.default_rng(
        np.random.SeedSequence(seed, spawn_key=(VARIANCE_STREAM_KEY,)))
    return np.sort(stream.choice(m, size=count, replace=False))


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
