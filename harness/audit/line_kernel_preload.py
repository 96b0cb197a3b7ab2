"""The fork server's warm-up for the audit's own compiled kernels on a line.

On 1D points with a half-integer Matern kernel every audit child forms the kriging means
with the exact products of ``harness.references.line_products``
(``harness.audit.sides.line_cross_product``). Loading their compiled code from numba's
cache cost each child about 0.3 s (a development measurement on 2 cores), once per
(knob value, seed) audit. ``check`` names this module among the fork server's preloaded
modules (``harness.check.plugin_guard.prepare_solver_children``) beside the solvers'
(``harness.solvers.compiled_preload``); its import loads them there once
(``harness.infra.kernel_cache.load_cached_kernels``), and forked children call them at
once. The kernels are serial, so the server's threading layer stays unstarted.
"""

from __future__ import annotations

from harness.infra.kernel_cache import LoadedKernels, load_cached_kernels

#: Modules with the audit's compiled kernels.
AUDIT_KERNEL_MODULES: tuple[str, ...] = ("harness.references.line_products",)

#: What this module's import loaded.
LOADED: LoadedKernels = load_cached_kernels(AUDIT_KERNEL_MODULES)
