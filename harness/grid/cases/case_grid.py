"""The validated content of a case file: a grid of audit settings, expanded into tasks."""

from __future__ import annotations

import itertools
from collections.abc import Mapping
from dataclasses import dataclass, field, fields
from typing import Any

from harness.grid.tasks import AuditSettings, PointSetSpec, Task


@dataclass(frozen=True)
class PointSetEntry:
    """One ``[[pointsets]]`` table: where points come from, and the sizes and dimensions."""

    spec: PointSetSpec
    sizes: tuple[int, ...]
    dims: tuple[int, ...]

    def to_dict(self) -> dict[str, Any]:
        return {"spec": self.spec.to_dict(), "sizes": list(self.sizes), "dims": list(self.dims)}


@dataclass(frozen=True)
class KernelEntry:
    """One ``[[kernels]]`` table: a family, its natural-scale parameters, separability."""

    family: str
    params: Mapping[str, Any]
    separable: bool = False

    def to_dict(self) -> dict[str, Any]:
        return {"family": self.family, "params": dict(self.params), "separable": self.separable}


@dataclass(frozen=True)
class SolverEntry:
    """One ``[[solvers]]`` table, resolved: name, version, the values of its accuracy knob,
    factory options.

    ``tolerances`` holds the values of the knob named ``knob_name``
    (``harness.solvers.knobs``): tolerances for a ``tol`` solver (``(None,)`` for an exact
    one), ``neighbours`` values for the Vecchia solver.
    """

    name: str
    version: str
    tolerances: tuple[float | None, ...]
    options: Mapping[str, Any] = field(default_factory=dict)
    max_n: int | None = None
    knob_name: str = "tol"

    @property
    def knob_values(self) -> tuple[float | None, ...]:
        """The knob's values (the same tuple as ``tolerances``)."""
        return self.tolerances

    def to_dict(self) -> dict[str, Any]:
        out = {"name": self.name, "version": self.version, "max_n": self.max_n,
               "tolerances": list(self.tolerances), "options": dict(self.options)}
        if self.knob_name != "tol":
            out |= {"tolerances": [], "knob_name": self.knob_name,
                    "knob_values": list(self.tolerances)}
        return out


@dataclass(frozen=True, kw_only=True)
class Case(AuditSettings):
    """A validated case grid; ``tasks()`` is the cross product.

    The product runs over point sets x sizes x dimensions x kernels x mean models x
    solvers x knob values (tolerances) x seeds; sizes above a solver's ``max_n`` are left
    out for it.
    A tensor-grid point set takes only sizes that are perfect d-th powers (validation
    rejects the others).
    """

    name: str
    description: str
    source: str
    pointsets: tuple[PointSetEntry, ...]
    kernels: tuple[KernelEntry, ...]
    means: tuple[str, ...]
    reml: bool
    solvers: tuple[SolverEntry, ...]
    seeds: tuple[int, ...]

    def to_dict(self) -> dict[str, Any]:
        out: dict[str, Any] = {}
        for name in self.__dataclass_fields__:
            value = getattr(self, name)
            if name in ("pointsets", "kernels", "solvers"):
                value = [entry.to_dict() for entry in value]
            elif isinstance(value, tuple):
                value = list(value)
            out[name] = value
        return out

    def tasks(self) -> list[Task]:
        """Every cell of the grid, in a deterministic order, without duplicates."""
        out: list[Task] = []
        seen: set[str] = set()
        settings = {f.name: getattr(self, f.name) for f in fields(AuditSettings)}
        for entry in self.pointsets:
            for n, d in itertools.product(entry.sizes, entry.dims):
                for kern, mean, solver in itertools.product(self.kernels, self.means,
                                                            self.solvers):
                    if solver.max_n is not None and n > solver.max_n:
                        continue
                    for value, seed in itertools.product(solver.knob_values, self.seeds):
                        is_tol = solver.knob_name == "tol"
                        task = Task(
                            case=self.name, pointset=entry.spec, n=n, d=d,
                            kernel=kern.family, kernel_params=dict(kern.params),
                            separable=kern.separable, mean=mean, reml=self.reml,
                            solver=solver.name, solver_version=solver.version,
                            solver_options=dict(solver.options),
                            tol=value if is_tol else None, seed=seed,
                            knob_name=solver.knob_name, knob_value=value,
                            **settings,
                        )
                        if task.key not in seen:
                            seen.add(task.key)
                            out.append(task)
        return out


def is_perfect_power(n: int, d: int) -> bool:
    side = round(n ** (1.0 / d))
    return any((side + k) ** d == n for k in (-1, 0, 1) if side + k > 0)


