"""``covaudit warm-up``: compile every kernel ahead, so that no later call waits for it.

The compiled kernels (numba, ``cache=True``) are compiled on their first call and kept in
numba's cache; without this verb the first call of each path pays that once
(``harness.infra.compile_notice``). Here every path runs once on a tiny problem
(``WARM_UP_N`` points): each kernel family through the dense, HODLR and Vecchia solvers
with the log-likelihood, score and Fisher information, the dense reference with kriging,
the exact-operator reference's tiled products, and the state-space reference's filter,
sensitivities and smoother on a line. It prints what it compiled with the seconds, or that
everything was already compiled.
"""

from __future__ import annotations

import argparse
import sys
import time
from collections.abc import Callable
from functools import partial

import numpy as np

from harness.infra.compile_notice import CompileLog, record_compiles
from harness.infra.exit_codes import ExitCode
from harness.likelihood import evaluate_likelihood
from harness.model.kernels import KERNELS, Kernel, make_kernel
from harness.references import StateSpaceError, StateSpaceReference, dense_kriging
from harness.references.line_products import LineProducts
from harness.references.operator import operator_evaluate
from harness.references.statespace_kriging import smoother_kriging
from harness.solvers.registry import resolve_solver

#: Points of each warm-up problem: large enough for the HODLR solver to compress a block
#: (leaf size 128), small enough that the arithmetic takes well under a second.
WARM_UP_N = 300
#: The shape parameter of the families that take one (nu for matern, alpha for
#: rational_quadratic); the others ignore it.
_SHAPES = {"matern": {"nu": 1.2}, "rational_quadratic": {"alpha": 1.5}}


def add_parser(subparsers: argparse._SubParsersAction) -> None:
    p = subparsers.add_parser(
        "warm-up", help="compile every kernel ahead of the first check or run",
        description="Compile every compiled kernel (solvers, references, kernel families) "
                    f"once on tiny problems of {WARM_UP_N} points and keep them in numba's "
                    "cache, so that no later call waits for compilation. A second run "
                    "finds everything compiled and returns in seconds.")
    p.add_argument("--quiet", action="store_true", help="print only the summary line")


def _kernel(family: str) -> Kernel:
    return make_kernel(family, {"variance": 1.0, "lengthscale": 0.2, "nugget": 1e-2,
                                **_SHAPES.get(family, {})})


def _solver(name: str, options: dict[str, float | int | None], kernel: Kernel,
            points: np.ndarray, y: np.ndarray) -> str | None:
    """One built-in solver with the log-likelihood, score and Fisher information."""
    tol = options.get("tol")
    knobs = {k: v for k, v in options.items() if k != "tol"}
    solver = resolve_solver(name)
    factor = solver.factorize(points, kernel, None, tol=tol, **knobs)
    evaluate_likelihood(factor, points, y, kernel, mean="constant", fisher=True)
    if name == "vecchia":
        # The radius rule's pattern, and the row-wise triangular products and solves
        # that a block of right-hand sides takes (kriging, probes).
        by_radius = solver.factorize(points, kernel, None, tol=None, rho=3.0)
        block = np.ones((points.shape[0], 16))
        by_radius.matvec(by_radius.solve(block))
    return None


def _dense_reference(kernel: Kernel, points: np.ndarray, y: np.ndarray) -> str | None:
    """The dense reference's kriging at 16 new points."""
    dense_kriging(points, y, kernel, points[:16] + 1e-3)
    return None


def _operator_reference(kernel: Kernel, points: np.ndarray, y: np.ndarray) -> str | None:
    """The exact-operator reference (tiled exact products), preconditioned by dense."""
    dense = resolve_solver("dense").factorize(points, kernel, tol=None)
    operator_evaluate(points, y, kernel, preconditioner=dense, rng=0, max_probes=16,
                      min_probes=16, progress=False)
    return None


def _state_space(kernel: Kernel, line: np.ndarray, y: np.ndarray) -> str | None:
    """The Kalman filter, its sensitivities, the RTS smoother (half-integer Matern) and
    the exact O(n) line products of the audit's shared probes."""
    try:
        reference = StateSpaceReference(line, kernel)
    except StateSpaceError:
        return "no state-space form"
    reference.evaluate(y, mean="constant")
    smoother_kriging(line, y, kernel, line[:16] + 1e-3, mean="constant")
    LineProducts(line, kernel).matvec(np.ones((line.shape[0], 2)))
    return None


#: The built-in solvers and the knob value each warms up at.
_SOLVERS: dict[str, dict[str, float | int | None]] = {
    "dense": {"tol": None}, "hodlr": {"tol": 1e-6}, "vecchia": {"tol": None, "neighbours": 10}}


def warm_up_steps() -> list[tuple[str, Callable[[], str | None]]]:
    """(label, step) for every path with compiled kernels, in the order they run; a step
    returns a note when it had nothing to run. The Vecchia solver and the tiled exact
    products take only the compiled closed forms; the other families (matern at any nu)
    go through numpy there, with nothing to compile."""
    rng = np.random.default_rng(0)
    points = rng.random((WARM_UP_N, 2))
    y = rng.standard_normal(WARM_UP_N)
    line = np.sort(rng.random((WARM_UP_N, 1)), axis=0)
    steps: list[tuple[str, Callable[[], str | None]]] = []
    for family in KERNELS:
        kernel = _kernel(family)
        for name, options in _SOLVERS.items():
            if name != "vecchia" or kernel.compiled:
                steps.append((f"{family}: {name} solver, L, score and Fisher",
                              partial(_solver, name, options, kernel, points, y)))
        steps.append((f"{family}: dense reference's kriging",
                      partial(_dense_reference, kernel, points, y)))
        if kernel.compiled:
            steps.append((f"{family}: exact-operator reference",
                          partial(_operator_reference, kernel, points, y)))
        steps.append((f"{family}: state-space filter and smoother",
                      partial(_state_space, kernel, line, y)))
    return steps


def _report(label: str, log: CompileLog, seconds: float, note: str | None) -> str:
    if note is not None:
        return f"  {label}: skipped, {note}"
    if not log.kernels:
        return f"  {label}: already compiled ({seconds:.1f} s)"
    return (f"  {label}: compiled {len(log.kernels)} kernel"
            f"{'s' if len(log.kernels) != 1 else ''} in {seconds:.1f} s")


def run(args: argparse.Namespace) -> int:
    start = time.perf_counter()
    compiled = 0
    for label, step in warm_up_steps():
        began = time.perf_counter()
        with record_compiles() as log:
            try:
                note = step()
            except (ValueError, np.linalg.LinAlgError, MemoryError) as exc:
                print(f"covaudit warm-up: error: {label}: {exc}", file=sys.stderr)
                return ExitCode.ERROR
        compiled += len(log.kernels)
        if not args.quiet:
            print(_report(label, log, time.perf_counter() - began, note))
    total = time.perf_counter() - start
    if compiled:
        print(f"warm-up: compiled {compiled} kernel{'s' if compiled != 1 else ''} in "
              f"{total:.1f} s; later calls load them from numba's cache")
    else:
        print(f"warm-up: everything was already compiled ({total:.1f} s)")
    return ExitCode.OK
