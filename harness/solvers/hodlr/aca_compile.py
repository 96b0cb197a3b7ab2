"""On a cold cache, compile the ACA kernel on two processes at once.

``aca.aca_compiled`` is the costliest first compilation of the project: about 9 s on one
core (numba 0.68), of which its callees take about 5.5 s and the kernel itself about 3.5 s
once they are compiled. The callees do not depend on one another, and numba's dispatcher
loads a signature from its on-disk cache before it compiles one; so when the cache lacks
the kernel, ``prepare_aca`` splits the callees (and the leaves' fill) in two shares of about 3 s
(``SHARES``): a helper process (``python -m harness.solvers.hodlr.aca_compile``) compiles
one into the cache while this process compiles the other, and when both are done the
kernel's own compilation finds every callee compiled. The shares name each callee with
the exact signature the kernel calls it with; ``tests/test_hodlr.py`` checks them against
the signatures a plain compilation produces, so a change to the kernel that changes them
fails there rather than silently compiling twice.

The helper is a courtesy, never a dependency: when it cannot start, fails or outlasts
``HELPER_SECONDS``, the kernel compiles its missing callees itself, as without it. With
the kernel in the cache (every call after the first on a machine) nothing starts.
"""

from __future__ import annotations

import subprocess
from typing import Any

from numba import types

from harness.infra.kernel_cache import has_cached_signature, start_compile_helper
from harness.model.kernels.rows import fill_block
from harness.solvers.hodlr import aca

#: Seconds to wait for the helper before the kernel compiles without it.
HELPER_SECONDS = 120.0

_I8, _F8 = types.int64, types.float64
_F1 = types.Array(types.float64, 1, "C")
_F2 = types.Array(types.float64, 2, "C")
_I1 = types.Array(types.int64, 1, "C")

#: process -> (kernel, the signature the factorization calls it with), about 3 s each
SHARES: dict[str, tuple[tuple[Any, tuple[types.Type, ...]], ...]] = {
    # the helper also starts its interpreter (about 1.5 s) and compiles the leaves' fill,
    # which the factorization calls after the compressions
    "helper": ((aca._residuals, (_I8, _F2, _F2, _I1, _I8, _F8, _F8, _I8, _F2, _F2, _I8,
                                 _F2)),
               (fill_block, (_I8, _F2, _F2, _F8, _F8, _I8, _F2))),
    "main": ((aca._cross_pivots, (_F2, _I8, _I8, _I1, _I1)),
             (aca._grow, (_F1, _F2, _F2, _I8, _I8, _I8)),
             (aca._extend_gram, (_F2, _F2, _I8, _I8)),
             (aca._skeleton_factors, (_F2,))),
}


def compile_share(name: str) -> None:
    """Compile the kernels of share ``name`` into numba's cache."""
    for kernel, signature in SHARES[name]:
        kernel.compile(signature)


def prepare_aca() -> None:
    """Compile ``aca_compiled``'s callees on two processes if the cache lacks the kernel
    (module docstring); a no-op when it has it."""
    if has_cached_signature(aca.aca_compiled):
        return
    helper = start_compile_helper("harness.solvers.hodlr.aca_compile")
    if helper is None:
        return
    try:
        compile_share("main")
    finally:
        try:
            helper.wait(timeout=HELPER_SECONDS)
        except subprocess.TimeoutExpired:
            helper.kill()
            helper.wait()


if __name__ == "__main__":
    compile_share("helper")
