"""The one reference selector of ``check`` and ``run``: which reference judges a solver.

``select_reference`` walks the kinds a verb allows, in the order of trust of DEVELOPERS.md
("The reference order"), and takes the first that applies to the data, the kernel and the
memory budget:

1. ``dense``: the certified dense Cholesky, whenever it fits the memory budget;
2. ``statespace``: the exact Kalman filter, for one-dimensional points and a half-integer
   Matern kernel (nu in ``HALF_INTEGER_NU``), not the separable product form;
3. ``kronecker``: the exact Kronecker factorization, for a full tensor grid and a
   separable kernel;
4. ``operator``: exact kernel products tile by tile (PCG and Lanczos quadrature), when
   installed;
5. ``ladder``: the solver under test at a tighter tolerance, a stand-in that is never the
   sole basis of ``safe``; only where the verb allows it and the solver has a tolerance.

The user's choice enters as ``allowed``: ``AUTO_ORDER`` for ``--reference auto``, one kind
for an explicit choice, a case file's ``[reference] order`` for a grid task (its order is
kept as written). Every kind passed over is listed with its reason.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

from harness.audit.rule import REFERENCE_KINDS
from harness.linalg.dense_budget import DenseBudgetError, check_dense_budget
from harness.model.kernels import Kernel, smoothness

#: Matern smoothness values with an exact state-space form.
HALF_INTEGER_NU: tuple[float, ...] = (0.5, 1.5, 2.5)
#: The exact references in decreasing order of trust (``--reference auto``).
AUTO_ORDER: tuple[str, ...] = ("dense", "statespace", "kronecker", "operator")


@dataclass(frozen=True, kw_only=True)
class ReferenceProblem:
    """What the selector looks at.

    Attributes
    ----------
    n, d : int
        Number of points and their dimension.
    kernel : Kernel or None
        The kernel (None or a non-Matern kernel rules out the state-space reference).
    separable : bool
        The kernel is the separable product form (``harness.references.kronecker``).
    tensor_grid : bool
        The points are a full tensor grid.
    memory_budget : int or None
        Bytes the dense reference may use (None: the default budget).
    dense_fisher : bool
        The dense reference must also give the Fisher information (a grid task) and so
        needs p + 1 more n x n arrays.
    has_tolerance : bool
        The solver under test has a tolerance to tighten (the ladder needs one).
    operator_installed : bool
        The exact operator reference can be imported.
    """

    n: int
    d: int
    kernel: Kernel | None
    separable: bool = False
    tensor_grid: bool = False
    memory_budget: int | None = None
    dense_fisher: bool = False
    has_tolerance: bool = True
    operator_installed: bool = True


@dataclass(frozen=True)
class ReferenceChoice:
    """The kind taken and, for each kind passed over, why."""

    kind: str
    declined: tuple[str, ...] = ()


class NoReference(ValueError):
    """No allowed kind applies; ``declined`` holds each kind's reason."""

    def __init__(self, declined: Sequence[str]) -> None:
        self.declined = tuple(declined)
        super().__init__("no reference available: " + "; ".join(self.declined))


def _why_not(kind: str, problem: ReferenceProblem) -> str | None:
    """The reason ``kind`` does not apply to ``problem``, or None when it does."""
    if kind == "dense":
        n_params = problem.kernel.n_params + 1 if problem.kernel is not None else 0
        try:
            check_dense_budget(problem.n, budget=problem.memory_budget,
                               score=not problem.dense_fisher, fisher=problem.dense_fisher,
                               n_params=n_params if problem.dense_fisher else 0)
        except DenseBudgetError as exc:
            return f"dense: {exc}"
        return None
    if kind == "statespace":
        nu = smoothness(problem.kernel) if isinstance(problem.kernel, Kernel) else None
        if problem.d != 1 or nu not in HALF_INTEGER_NU or problem.separable:
            family = problem.kernel.family if problem.kernel is not None else None
            return (f"statespace: needs 1D points and a Matern kernel with nu in "
                    f"{HALF_INTEGER_NU} (got d = {problem.d}, {family})")
        return None
    if kind == "kronecker":
        if not (problem.separable and problem.tensor_grid):
            return ("kronecker: needs a separable kernel (separable = true) on a "
                    "tensor_grid point set")
        return None
    if kind == "operator":
        if not problem.operator_installed:
            return "operator: the exact operator reference is not installed"
        return None
    if kind == "ladder":
        if not problem.has_tolerance:
            return "ladder: the solver is exact (no tolerance to tighten)"
        return None
    raise ValueError(f"reference kind {kind!r}: expected one of {', '.join(REFERENCE_KINDS)}")


def select_reference(problem: ReferenceProblem, *, allowed: Sequence[str] = AUTO_ORDER
                     ) -> ReferenceChoice:
    """The first kind of ``allowed`` that applies to ``problem`` (module docstring).

    Parameters
    ----------
    problem : ReferenceProblem
    allowed : sequence of str
        The kinds the verb allows, in the order tried.

    Returns
    -------
    ReferenceChoice

    Raises
    ------
    NoReference
        When no allowed kind applies.
    """
    declined: list[str] = []
    for kind in allowed:
        reason = _why_not(kind, problem)
        if reason is None:
            return ReferenceChoice(kind, tuple(declined))
        declined.append(reason)
    raise NoReference(declined)
