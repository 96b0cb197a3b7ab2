"""Compile, on the second core, the kernels a check needs later, while it calibrates.

On a fresh install (or a cleared numba cache) every compiled kernel compiles on its first
call (``harness.infra.compile_notice``). A check calls them in a fixed order: the plan's
calibration first (the solver under test, HODLR's compression kernel alone about 9 s,
then the dense fill), then, in child processes, the dense reference (covariance and
derivative fills) and the audits (the exact products behind the efficiency criteria).
Those later kernels do not depend on anything the calibration computes, so a helper
process compiles them at the same time, on tiny inputs of the same types, into numba's
on-disk cache; a child that later calls one loads it from there instead of compiling it.

Only what this check will call, and only what the cache lacks (``missing_parts``): with a
warm cache no helper starts. The helper is a courtesy, never a dependency: its output is
discarded, a failure or a kernel it has not finished leaves that kernel to be compiled
where it is called, as without it, and ``CompileAhead.finish`` stops it when the check
ends.

Parts (the reference kind decides which apply, ``parts_for``):

- ``dense``: the dense reference's fills: the lower triangle for its Cholesky (which the
  calibration times after the solvers, ``plan_calibration.calibrate``), with derivatives,
  and cross-covariances (``harness.model.kernels.assembly``);
- ``products``: the exact products from kernel tiles
  (``harness.references.operator.products``), behind the dense reference's efficiency
  criteria and the whole exact-operator reference (the structured references use
  neither part).

Run as ``python -m harness.check.compile_ahead FAMILY PART...`` by ``start_compile_ahead``.
"""

from __future__ import annotations

import importlib
import os
import subprocess
import sys
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from harness.check.check_options import CheckOptions
from harness.check.fit_stage import model_template
from harness.check.reference_kind import reference_kind
from harness.infra.kernel_cache import has_cached_signature, start_compile_helper

#: part -> (module, kernel) whose cached signature says the part is already compiled
PART_KERNELS: dict[str, tuple[tuple[str, str], ...]] = {
    "dense": (("harness.model.kernels.assembly", "_fill_lower_symmetric"),
              ("harness.model.kernels.assembly", "_fill_with_derivatives"),
              ("harness.model.kernels.assembly", "_fill_correlation")),
    "products": (("harness.references.operator.products", "_round_product"),),
}
#: The helper's scheduling priority offset (Unix ``nice``).
NICENESS = 10
#: Points of the tiny problems the helper compiles on.
_POINTS = 64


def parts_for(reference: str, *, compiled_family: bool) -> tuple[str, ...]:
    """The parts a check with this reference kind calls after its calibration (none for
    a kernel without compiled closed forms: its fills run in numpy)."""
    if not compiled_family:
        return ()
    if reference == "dense":
        return ("dense", "products")
    if reference == "operator":
        return ("products",)
    return ()


def compile_ahead_for(options: CheckOptions, points: np.ndarray) -> CompileAhead | None:
    """``start_compile_ahead`` for the parts a check with ``options`` will call."""
    template = model_template(options, int(points.shape[1]))
    kind, _ = reference_kind(options, points, template)
    return start_compile_ahead(options.kernel,
                               parts_for(kind, compiled_family=template.compiled))


def missing_parts(parts: Sequence[str]) -> tuple[str, ...]:
    """The parts with a kernel that has no signature in numba's cache."""
    out = []
    for part in parts:
        for module, name in PART_KERNELS[part]:
            if not has_cached_signature(getattr(importlib.import_module(module), name)):
                out.append(part)
                break
    return tuple(out)


@dataclass
class CompileAhead:
    """A running helper (``start_compile_ahead``)."""

    process: subprocess.Popen[bytes]
    parts: tuple[str, ...]

    def finish(self) -> None:
        """Stop the helper if it is still running: once the check has ended nothing waits
        for it (numba writes each cache file whole, so a stopped helper leaves none
        half-written)."""
        if self.process.poll() is None:
            self.process.kill()
        self.process.wait()


def start_compile_ahead(family: str, parts: Sequence[str]) -> CompileAhead | None:
    """Start the helper for the ``parts`` the cache lacks, or None when it lacks none (or
    the helper cannot start: the kernels then compile where they are called)."""
    todo = missing_parts(parts)
    if not todo:
        return None
    process = start_compile_helper("harness.check.compile_ahead", family, *todo)
    return None if process is None else CompileAhead(process=process, parts=todo)


def compile_parts(family: str, parts: Sequence[str]) -> None:
    """Call each part's kernels once on a tiny problem of ``family`` (the types the check
    passes them: C-ordered float64 points and blocks)."""
    from harness.model.kernels import assemble_lower, make_kernel

    kernel = make_kernel(family, {"variance": 1.0, "lengthscale": 0.3, "nugget": 0.1})
    points = np.random.default_rng(0).random((_POINTS, 2))
    rows = np.arange(_POINTS)
    if "dense" in parts:
        assemble_lower(kernel, points)
        kernel.block_with_derivatives(points, rows, rows[: _POINTS // 2])
        kernel.cross_covariance(points, points[: _POINTS // 2])
    if "products" in parts:
        from harness.references.operator.products import KernelOperator

        KernelOperator(points, kernel, progress=False).matvec(np.ones((_POINTS, 2)))


if __name__ == "__main__":
    # Below the check's own processes: on a cold cache the solver's kernels, which the
    # calibration compiles now on both cores (``harness.solvers.hodlr.aca_compile``),
    # come first; this helper takes what time they leave
    os.nice(NICENESS)
    compile_parts(sys.argv[1], sys.argv[2:])
