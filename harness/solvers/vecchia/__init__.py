"""Built-in Vecchia solver: the KL-minimizing sparse inverse Cholesky factor of Sigma.

Modules, one concern each: ``kdtree`` (compiled ball queries), ``maximin`` (the
ordering and length scales), ``sparsity`` (the nearest and radius patterns), ``supernodes``
(aggregation), ``structure`` (all three, cached per point set), ``local_factor`` (the
compiled per-supernode pass: U, dU, score and Fisher sums), ``triangular`` (sparse
products and solves with U), ``factorization`` (the Factorization and ``factorize``),
``vecchia_likelihood`` (the approximation's own log-likelihood, gradient and Fisher
information), ``vecchia_inputs`` (kernel codes and input checks).
"""

from harness.solvers.vecchia.factorization import (
    DEFAULT_LAM,
    DEFAULT_NEIGHBOURS,
    NEIGHBOURS_KNOB,
    RHO_RANGE,
    VecchiaFactorization,
    VecchiaTimings,
    factorize,
)
from harness.solvers.vecchia.maximin import MaximinOrder, maximin_order
from harness.solvers.vecchia.structure import (
    StructureCache,
    VecchiaStructure,
    build_structure,
)
from harness.solvers.vecchia.vecchia_inputs import VecchiaInputError

__all__ = [
    "DEFAULT_LAM",
    "DEFAULT_NEIGHBOURS",
    "NEIGHBOURS_KNOB",
    "RHO_RANGE",
    "MaximinOrder",
    "StructureCache",
    "VecchiaFactorization",
    "VecchiaInputError",
    "VecchiaStructure",
    "VecchiaTimings",
    "build_structure",
    "factorize",
    "maximin_order",
]
