"""The fork server's warm-up: importing this module loads the built-in solvers' compiled
kernels from numba's cache, so that the children forked after it call them at once.

``check`` runs every call into the solver under test in a child process forked from
multiprocessing's fork server (``harness.infra.child_process``), and a fork server runs
only imports before it forks. ``check`` names this module among the server's preloaded
modules (``harness.check.plugin_guard.prepare_solver_children``); its import loads the
serial kernels of ``COMPILED_MODULES`` (``harness.infra.kernel_cache``: the kernel
families' scalar closed forms, row and block fills, HODLR's adaptive cross approximation,
Vecchia's ordering and neighbour search). The parallel kernels (Vecchia's sparsity
patterns, supernode passes and triangular products) are not: loading one would start numba's
threading layer in the server, which a forked child cannot survive; every child loads
those itself. What was loaded is kept in ``LOADED``.

Importing it anywhere else costs the same loading (about 1 s on a warm cache) and has
no other effect; nothing imports it at module level.
"""

from __future__ import annotations

from harness.infra.kernel_cache import LoadedKernels, load_cached_kernels

#: Modules with the compiled kernels of each built-in solver.
COMPILED_MODULES: dict[str, tuple[str, ...]] = {
    "dense": ("harness.model.kernels.assembly",),
    "hodlr": ("harness.model.kernels.assembly", "harness.model.kernels.rows",
              "harness.solvers.hodlr.aca"),
    "vecchia": ("harness.model.kernels.assembly", "harness.model.kernels.rows",
                "harness.solvers.vecchia.maximin", "harness.solvers.vecchia.kdtree",
                "harness.solvers.vecchia.sparsity", "harness.solvers.vecchia.supernodes",
                "harness.solvers.vecchia.local_factor", "harness.solvers.vecchia.triangular"),
}


def preload_modules() -> tuple[str, ...]:
    """Every module of ``COMPILED_MODULES`` once, in a fixed order."""
    return tuple(dict.fromkeys(m for modules in COMPILED_MODULES.values() for m in modules))


#: What this module's import loaded (module docstring).
LOADED: LoadedKernels = load_cached_kernels(preload_modules())
