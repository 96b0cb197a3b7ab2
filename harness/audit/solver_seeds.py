"""The seed of a solver's own randomness, derived one way in every verb.

``check``, ``evaluate`` and every ``run`` task derive the integer seed handed to a
randomized solver from a base seed (``--seed``, a task's ``seed``) and a seed index
(0, 1, .., K - 1 for ``--solver-seeds K``) by numpy's ``SeedSequence`` spawning
(numpy's "Parallel random number generation" guide):

    seed(base, index) = first 63-bit word of SeedSequence(base, spawn_key=(SOLVER_KEY, index))

so the same base seed and index give the same factorization, hence the same numbers, in
every verb, and different indices give statistically independent streams.

The seed reaches the factory as the keyword option it declares by name: ``rng`` (the
built-in solver; DEVELOPERS.md, "How to add a solver plugin") or ``seed``. A factory that declares
neither is treated as deterministic and gets no seed (a catch-all ``**options`` is not a
declaration: the example plugin refuses unknown options).
"""

from __future__ import annotations

import inspect
from collections.abc import Callable, Mapping
from typing import Any

import numpy as np

#: Spawn-key word reserved for the solver's stream (ASCII "solv").
SOLVER_KEY = 0x736F6C76
#: Option names a factory may declare to receive the seed, in order of preference.
SEED_OPTIONS: tuple[str, ...] = ("rng", "seed")
#: Default number of solver seeds each tolerance is audited over.
DEFAULT_SOLVER_SEEDS = 3


class SolverSeedError(ValueError):
    """A base seed or seed index outside the accepted range."""


def solver_seed(base_seed: int, index: int = 0) -> int:
    """The solver's seed for ``base_seed`` and ``index`` (module docstring).

    Raises
    ------
    SolverSeedError
        When ``base_seed`` or ``index`` is negative or not an integer.
    """
    for name, value in (("seed", base_seed), ("seed index", index)):
        if isinstance(value, bool) or not isinstance(value, int | np.integer) or value < 0:
            raise SolverSeedError(f"{name}: expected an integer >= 0, got {value!r}")
    seq = np.random.SeedSequence(int(base_seed), spawn_key=(SOLVER_KEY, int(index)))
    return int(seq.generate_state(2, dtype=np.uint64)[0] >> np.uint64(1))


def solver_seeds(base_seed: int, count: int) -> tuple[int, ...]:
    """Seeds for indices 0 .. count - 1 (``count`` >= 1)."""
    if isinstance(count, bool) or not isinstance(count, int) or count < 1:
        raise SolverSeedError(f"--solver-seeds: expected an integer >= 1, got {count!r}")
    return tuple(solver_seed(base_seed, i) for i in range(count))


def seed_option(factory: Callable[..., Any]) -> str | None:
    """The option name through which ``factory`` takes its seed, or None."""
    try:
        params = inspect.signature(factory).parameters
    except (TypeError, ValueError):
        return None
    return next((name for name in SEED_OPTIONS if name in params), None)


def seeded_options(factory: Callable[..., Any], options: Mapping[str, Any], seed: int
                   ) -> dict[str, Any]:
    """``options`` plus the seed under the factory's declared name.

    An explicit ``rng``/``seed`` already in ``options`` (a case file's setting) is kept.
    """
    out = dict(options)
    name = seed_option(factory)
    if name is not None and not any(k in out for k in SEED_OPTIONS):
        out[name] = int(seed)
    return out
