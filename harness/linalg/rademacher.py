"""Random probe vectors for stochastic trace estimation: the project's one Rademacher generator.

It sits below the references and the likelihood, which both draw probes (the trace
estimators of ``harness.likelihood.trace``, the exact-operator reference's Lanczos and score
traces, the audit's probe block), so one seed gives one probe block everywhere.
"""

from __future__ import annotations

import numpy as np


def rademacher_probes(n: int, m: int, rng: np.random.Generator | int | None = None
                      ) -> np.ndarray:
    """An (n, m) block of independent Rademacher entries (+1 or -1, each with probability 1/2).

    Rademacher probes give the smallest variance among i.i.d. probe distributions with
    E[z z'] = I (Hutchinson 1989, Commun. Statist. Simul. Comput. 18, 1059-1076).

    Parameters
    ----------
    n, m : int
        Rows (the matrix order) and number of probes.
    rng : Generator, int or None
        Passed to ``numpy.random.default_rng``.
    """
    if n < 1 or m < 1:
        raise ValueError(f"probe block needs n >= 1 and m >= 1, got n = {n}, m = {m}")
    gen = np.random.default_rng(rng)
    return gen.integers(0, 2, size=(n, m)).astype(float) * 2.0 - 1.0
