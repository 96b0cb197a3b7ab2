"""The parameter-free part of a Vecchia factorization: ordering, pattern, supernodes.

None of it depends on the kernel's parameters (the ordering and both pattern rules use
the raw coordinates), so a fit that factors Sigma(theta) at many theta on the same points
builds it once: pass the structure (``structure=``) or a ``StructureCache`` (``cache=``)
to ``factorize``. The cache is an object the caller owns and passes; the module keeps
no state between calls.
"""

from __future__ import annotations

import hashlib
import time
from collections import OrderedDict
from dataclasses import dataclass

import numpy as np

from harness.solvers.vecchia.maximin import MaximinOrder, maximin_order
from harness.solvers.vecchia.sparsity import nearest_pattern, radius_pattern
from harness.solvers.vecchia.supernodes import Supernodes, aggregate


@dataclass(frozen=True)
class StructureTimings:
    """Wall-clock seconds of building a structure."""

    ordering: float
    pattern: float
    supernodes: float

    @property
    def total(self) -> float:
        return self.ordering + self.pattern + self.supernodes

    def to_dict(self) -> dict[str, float]:
        return {"ordering": self.ordering, "pattern": self.pattern,
                "supernodes": self.supernodes, "total": self.total}


@dataclass(frozen=True)
class VecchiaStructure:
    """Maximin order, conditioning pattern and supernodes of one point set.

    Attributes
    ----------
    key : str
        ``points_key`` of the points it was built for.
    order : MaximinOrder
    rule : {"neighbours", "rho"}
        The pattern rule (``sparsity``): m nearest earlier points, or radius rho.
    value : float
        Its m or rho.
    groups : Supernodes
        Includes the factor's sparsity (``col_ptr``, ``col_rows``).
    pattern_nnz : int
        Entries of the plain radius pattern (before aggregation), diagonal included.
    timings : StructureTimings
    """

    key: str
    order: MaximinOrder
    rule: str
    value: float
    groups: Supernodes
    pattern_nnz: int
    timings: StructureTimings

    @property
    def n(self) -> int:
        return self.order.n

    def describe(self) -> str:
        """The rule and its value, e.g. ``neighbours = 20`` or ``rho = 6``."""
        return f"{self.rule} = {self.value:g}"

    @property
    def nnz(self) -> int:
        """Nonzeros of U (diagonal included)."""
        return self.groups.nnz

    @property
    def nnz_per_column(self) -> float:
        return self.nnz / max(self.n, 1)

    @property
    def nbytes(self) -> int:
        o = self.order
        return int(o.perm.nbytes + o.lengths.nbytes + o.nearest.nbytes + self.groups.nbytes)


def points_key(points: np.ndarray) -> str:
    """A hash of the points' shape and bytes (float64, C order)."""
    x = np.ascontiguousarray(points, dtype=float)
    h = hashlib.blake2b(digest_size=16)
    h.update(repr(x.shape).encode())
    h.update(x.tobytes())
    return h.hexdigest()


def pattern_rule(*, neighbours: float | None, rho: float | None) -> tuple[str, float]:
    """("neighbours", m) or ("rho", rho): exactly one of the two must be given."""
    if (neighbours is None) == (rho is None):
        raise ValueError("vecchia solver: give exactly one of neighbours (the m nearest "
                         "earlier points) and rho (the radius rule)")
    if neighbours is not None:
        return "neighbours", float(neighbours)
    return "rho", float(rho)  # type: ignore[arg-type]


def build_structure(points: np.ndarray, *, neighbours: int | None = None,
                    rho: float | None = None, lam: float | None = 1.5,
                    order: MaximinOrder | None = None) -> VecchiaStructure:
    """Order the points, find c(k) by one rule and aggregate (``maximin``,
    ``sparsity``, ``supernodes``). Exactly one of ``neighbours`` (m nearest earlier
    points) and ``rho`` (radius rule) is given. ``order`` reuses an ordering of the
    same points."""
    rule, value = pattern_rule(neighbours=neighbours, rho=rho)
    x = np.asarray(points, dtype=float)
    x = x[:, None] if x.ndim == 1 else x
    t0 = time.perf_counter()
    if order is None:
        order = maximin_order(x)
    t1 = time.perf_counter()
    if rule == "neighbours":
        pattern = nearest_pattern(x[order.perm], neighbours=int(value))
    else:
        pattern = radius_pattern(x[order.perm], order.lengths, rho=value)
    t2 = time.perf_counter()
    groups = aggregate(pattern.ptr, pattern.rows, order.lengths, lam=lam)
    t3 = time.perf_counter()
    return VecchiaStructure(key=points_key(x), order=order, rule=rule, value=value,
                            groups=groups, pattern_nnz=int(pattern.rows.size + x.shape[0]),
                            timings=StructureTimings(t1 - t0, t2 - t1, t3 - t2))


class StructureCache:
    """Structures by (points hash, rule, value, lam), the orderings by points hash; keeps the
    ``size`` most recently used structures.

    Owned and passed by the caller (a fit loop): ``factorize(..., cache=cache)``.
    """

    def __init__(self, size: int = 4) -> None:
        if size < 1:
            raise ValueError(f"StructureCache size must be >= 1, got {size}")
        self.size = int(size)
        self._structures: OrderedDict[tuple[str, str, float, float | None],
                                      VecchiaStructure] = OrderedDict()
        self.hits = 0
        self.misses = 0

    def get(self, points: np.ndarray, *, neighbours: int | None = None,
            rho: float | None = None, lam: float | None) -> VecchiaStructure:
        """The structure for these points, rule and lam, built on a miss."""
        rule, value = pattern_rule(neighbours=neighbours, rho=rho)
        key = points_key(points)
        entry = (key, rule, value, None if lam is None else float(lam))
        found = self._structures.get(entry)
        if found is not None:
            self._structures.move_to_end(entry)
            self.hits += 1
            return found
        self.misses += 1
        order = next((s.order for (k, _, _, _), s in self._structures.items() if k == key),
                     None)
        built = build_structure(points, neighbours=neighbours, rho=rho, lam=lam,
                                order=order)
        self._structures[entry] = built
        while len(self._structures) > self.size:
            self._structures.popitem(last=False)
        return built
