"""Point-set generators for audit grids; every generator takes an explicit ``rng``.

All generators return an (n, d) float64 array. The unit domain is [0, 1]^d unless a
generator says otherwise; kernels' length scales are read against it.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence

import numpy as np

RngLike = np.random.Generator | int | None


def _rng(rng: RngLike) -> np.random.Generator:
    return np.random.default_rng(rng)


def _check_n_d(n: int, d: int) -> None:
    if int(n) != n or n < 1:
        raise ValueError(f"n must be a positive integer, got {n!r}")
    if d not in (1, 2, 3):
        raise ValueError(f"d must be 1, 2 or 3, got {d!r}")


def uniform(n: int, d: int = 2, *, rng: RngLike = None) -> np.ndarray:
    """n points uniform in the unit square (d = 2) or cube (d = 3) or interval (d = 1)."""
    _check_n_d(n, d)
    return _rng(rng).random((n, d))


def jittered_grid(n: int, d: int = 2, *, jitter: float = 0.5, rng: RngLike = None) -> np.ndarray:
    """A regular grid of about n points in [0, 1]^d, each moved by up to ``jitter`` cells.

    The grid has ceil(n^(1/d)) points a side; the first n cells in a random order are
    kept, so exactly n points come back.
    """
    _check_n_d(n, d)
    if not 0 <= jitter <= 1:
        raise ValueError(f"jitter must be in [0, 1] (a fraction of a cell), got {jitter!r}")
    gen = _rng(rng)
    side = int(np.ceil(n ** (1.0 / d) - 1e-9))
    axes = [(np.arange(side) + 0.5) / side] * d
    cells = np.stack(np.meshgrid(*axes, indexing="ij"), axis=-1).reshape(-1, d)
    cells = cells[gen.permutation(cells.shape[0])[:n]]
    return cells + jitter * (gen.random((n, d)) - 0.5) / side


def clustered(n: int, d: int = 2, *, clusters: int = 8, spread: float = 0.05,
              background: float = 0.1, rng: RngLike = None) -> np.ndarray:
    """A Gaussian mixture: ``clusters`` centres uniform in the unit box, each point drawn
    around one of them with standard deviation ``spread``; a ``background`` fraction is
    uniform. Points are clipped to the unit box."""
    _check_n_d(n, d)
    if clusters < 1:
        raise ValueError(f"clusters must be >= 1, got {clusters!r}")
    if not 0 <= background <= 1:
        raise ValueError(f"background must be in [0, 1], got {background!r}")
    gen = _rng(rng)
    n_background = int(round(background * n))
    n_clustered = n - n_background
    centres = gen.random((clusters, d))
    labels = gen.integers(0, clusters, size=n_clustered)
    pts = centres[labels] + spread * gen.standard_normal((n_clustered, d))
    pts = np.vstack([pts, gen.random((n_background, d))])
    return np.clip(pts[gen.permutation(n)], 0.0, 1.0)


def sorted_1d(n: int, d: int = 1, *, irregular: bool = False, rng: RngLike = None) -> np.ndarray:
    """n sorted points on [0, 1]: a regular grid, or sorted uniform draws when irregular."""
    if d != 1:
        raise ValueError(f"sorted_1d makes 1-dimensional points; d = {d!r} was asked for")
    _check_n_d(n, 1)
    if irregular:
        x = np.sort(_rng(rng).random(n))
    else:
        x = (np.arange(n) + 0.5) / n
    return x[:, None]


def tensor_grid(shape: Sequence[int], *, extent: Sequence[float] | None = None) -> np.ndarray:
    """The tensor grid with ``shape[k]`` regular points along axis k (row-major order:
    the last coordinate varies fastest), on [0, extent_k]."""
    shape = tuple(int(s) for s in shape)
    if not 1 <= len(shape) <= 3 or min(shape) < 1:
        raise ValueError(f"shape must have 1 to 3 positive sizes, got {shape!r}")
    extent = tuple(extent) if extent is not None else (1.0,) * len(shape)
    axes = [np.linspace(0.0, e, s) if s > 1 else np.zeros(1)
            for s, e in zip(shape, extent, strict=True)]
    return np.stack(np.meshgrid(*axes, indexing="ij"), axis=-1).reshape(-1, len(shape))


def grid_side(n: int, d: int) -> int:
    """The side k of a tensor grid of n = k^d points; ValueError when n is not a d-th power."""
    side = round(n ** (1.0 / d))
    for k in (-1, 0, 1):
        if side + k > 0 and (side + k) ** d == n:
            return side + k
    raise ValueError(f"n = {n} is not a perfect {d}-th power; a tensor grid needs one")


def stretched(n: int, d: int = 2, *, aspect: float = 10.0, rng: RngLike = None) -> np.ndarray:
    """Uniform points in a rectangle [0, aspect] x [0, 1] (x [0, 1]): a long thin domain."""
    if d < 2:
        raise ValueError("stretched needs d >= 2")
    pts = uniform(n, d, rng=rng)
    pts[:, 0] *= aspect
    return pts


#: Generators by the name case files use. Each takes (n, d, *, rng, **options).
GENERATORS: dict[str, Callable[..., np.ndarray]] = {
    "uniform": uniform,
    "jittered_grid": jittered_grid,
    "clustered": clustered,
    "sorted_1d": sorted_1d,
    "stretched": stretched,
}


def generate(name: str, n: int, d: int, *, rng: RngLike = None, **options: float) -> np.ndarray:
    """Points from the generator called ``name`` (see ``GENERATORS``; ``tensor_grid``
    is built from its shape instead)."""
    try:
        generator = GENERATORS[name]
    except KeyError:
        raise ValueError(
            f"unknown point generator {name!r}; known: {', '.join(GENERATORS)}, tensor_grid"
        ) from None
    return generator(n, d, rng=rng, **options)
