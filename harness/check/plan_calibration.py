"""The short calibration of a check's cost plan: a few rates measured in the same run.

The plan (``harness.check.cost_plan``) states every predicted time in the project's unit,
one dpotrf (dense Cholesky) at n = 8,192 on this machine in the same run. Timing that
call would cost several seconds, so the calibration times a dpotrf at ``PROBE_N`` =
1,024 points instead and scales it by the Cholesky's n^3 / 3 flops (Golub and Van Loan,
*Matrix Computations*, 4th ed., sec. 4.2)::

    unit = t_dpotrf(PROBE_N) * (8192 / PROBE_N)^3

The probe is the project's dense-rate probe (``harness.linalg.dense_rate``, which the
grid's cost model uses too). It runs on one BLAS thread: threaded BLAS on a loaded
machine varies tenfold from call to call (measured on the project's busy 2-core machine:
0.28 to 0.53 s at n = 1,024 with two threads, 0.026 to 0.056 s with one), while one
thread gets its core. A small dpotrf on one thread runs below the rate of a large
threaded one, so this *predicted* unit is an upper estimate of the measured one (there
14 s against a measured 10.4 s, ``benchmarks/results/figure_drawing.json``;
``tests/test_check_plan.py`` holds the n^3 scaling to a factor). What else is timed,
each a fraction of a second:

- kernel assembly: the lower triangle of Sigma at ``PROBE_N`` points (entries per
  second, ``harness.model.kernels.lower_fill.assemble_lower``);
- each built-in solver under test (``SolverRate``): a factorization of a seeded subset
  of the data at ``CALIBRATION_SIZES`` points (``LINE_CALIBRATION_SIZES`` on a line; at
  most n) at each of its knob values (the tightest, the costliest, is also its rate for
  the stages priced at one value), its ``nbytes`` and one solve with ``SOLVE_COLUMNS``
  right-hand sides;
  the growth from the smaller to the larger size gives the exponent of a power law in n
  (``SolverRate.seconds_at``, ``nbytes_at``). A plugin is never called here: it runs
  only in child processes (``harness.check.plugin_guard``), so its cost is not predicted;
- the Kalman filter, when the fit is the exact one on a line or the reference the
  state-space one: one filter pass with the score at ``LINE_PASS_N`` of the points
  (seconds per point; the fit makes a few dozen, the reference a few);
- the exact operator reference, when the plan takes it: exact block products at two
  widths and the derivative products (``harness.references.operator.measure_product_cost``:
  a product's kernel entries cost the same at any width, so one column rate would
  misprice blocks of another width), its preconditioner as a ``SolverRate``, and its
  preconditioned CG iterations and Lanczos steps on a window of the data
  (``harness.references.operator.iteration_counts``: they set how many products the
  reference makes, and they stay about the same at n).

Each built-in solver is rated at every knob value of the check, not only the tightest:
a looser value is cheaper (HODLR on 65,536 scattered points took about 30 s per audit at
tol 1e-6 and 70 s at tol 1e-8, from the timestamps in
``benchmarks/results/check_at_scale_plane-65k.json``), and pricing every value at the
tightest overstated the audits there 2.6 times (794 s planned against about 310 s, in
that file's first version, commit b0f1ab9).

Randomness only through the ``rng`` passed in; the clock is ``time.perf_counter``.
"""

from __future__ import annotations

import math
import time
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

import numpy as np
import psutil

from harness.linalg.dense_rate import PROBE_N, measure_dense_rate
from harness.model.kernels import Kernel
from harness.solvers.registry import ResolvedSolver

if TYPE_CHECKING:
    from harness.references.operator.iteration_counts import IterationCounts
    from harness.references.operator.product_cost import ProductCost

#: The project's time unit: one dpotrf at this n, in the same run.
UNIT_N = 8192
#: Repeats of the dpotrf probe (the median is kept).
PROBE_REPEATS = 3
#: Subset sizes at which each built-in solver is factorized (each at most n).
CALIBRATION_SIZES: tuple[int, int] = (512, 2048)
#: The same for points on a line (d = 1), where a built-in solver is cheap (HODLR's ranks
#: stay at 2: 0.1 s at 16,384 points) and the check may reach 10^6 points: measured
#: nearer, the power law is extrapolated less far (from 2,048 points to 10^6, an error
#: of 0.1 in the exponent is a factor 1.9; from 16,384, 1.5).
LINE_CALIBRATION_SIZES: tuple[int, int] = (2048, 16384)
#: Right-hand sides of the timed solve.
SOLVE_COLUMNS = 64
#: Points of the timed Kalman-filter pass (``line_pass_rate``).
LINE_PASS_N = 4096
#: Points of the window on which the operator's iteration counts are measured
#: (``operator_iteration_counts``).
OPERATOR_WINDOW_N = 2048
#: The width at which the plan's JSON states a column rate (``product_columns_per_second``,
#: kept for scripts that read it): the operator's probe batch.
PRODUCT_REPORT_WIDTH = 16
#: Bounds of a fitted growth exponent: time from n to n^3, memory from n to n^2 (the
#: dense cases; a compressed solver lies between).
TIME_EXPONENT_RANGE: tuple[float, float] = (1.0, 3.0)
MEMORY_EXPONENT_RANGE: tuple[float, float] = (1.0, 2.0)


def _exponent(small: float, large: float, n_small: int, n_large: int,
              bounds: tuple[float, float]) -> float:
    """log(large / small) / log(n_large / n_small) clipped to ``bounds`` (the upper bound
    when the two sizes coincide: nothing to extrapolate then)."""
    if n_large <= n_small or small <= 0 or large <= 0:
        return bounds[1]
    value = math.log(large / small) / math.log(n_large / n_small)
    return min(max(value, bounds[0]), bounds[1])


@dataclass(frozen=True)
class SolverRate:
    """One solver's factorization measured at two subset sizes, as power laws in n.

    seconds(n) = factor_seconds * (n / n_measured)^time_exponent, and the same for the
    solve per right-hand side and for ``nbytes`` with ``memory_exponent``; the exponents
    come from the two sizes (``_exponent``), clipped to ``TIME_EXPONENT_RANGE`` and
    ``MEMORY_EXPONENT_RANGE``. At n = n_measured the values are measured, not predicted.
    """

    name: str
    knob: str
    value: float | None
    n_measured: int
    factor_seconds: float
    solve_seconds_per_column: float
    nbytes: int
    time_exponent: float
    memory_exponent: float

    def seconds_at(self, n: int) -> float:
        return self.factor_seconds * (n / self.n_measured) ** self.time_exponent

    def solve_seconds_at(self, n: int, columns: float) -> float:
        """Seconds of solves (or products) with ``columns`` right-hand sides at n: the
        measured seconds per column scaled like the factorization's memory (a solve
        touches every stored number once)."""
        return (columns * self.solve_seconds_per_column
                * (n / self.n_measured) ** self.memory_exponent)

    def nbytes_at(self, n: int) -> int:
        return int(self.nbytes * (n / self.n_measured) ** self.memory_exponent)

    def to_dict(self) -> dict[str, Any]:
        return {"solver": self.name, "knob": self.knob, "value": self.value,
                "n_measured": self.n_measured, "factor_seconds": self.factor_seconds,
                "solve_seconds_per_column": self.solve_seconds_per_column,
                "nbytes": self.nbytes, "time_exponent": self.time_exponent,
                "memory_exponent": self.memory_exponent}


@dataclass(frozen=True)
class Calibration:
    """The same-run rates of a plan (module docstring).

    Attributes
    ----------
    unit_seconds : float
        The predicted unit: one dpotrf at ``UNIT_N`` (``probe_seconds`` scaled by n^3).
    probe_n, probe_seconds : int, float
        The timed dpotrf's size and median seconds.
    assembly_entries_per_second : float
        Kernel entries of Sigma assembled per second.
    solvers : mapping of str to SolverRate
        By the solver's spelling as given to ``--solver`` (built-in solvers only), at its
        tightest knob value, and ``"preconditioner"`` for the operator reference's.
    value_rates : mapping of str to tuple of SolverRate
        By the same spelling, one rate per knob value of the check, loosest first.
    product_cost : ProductCost or None
        The cost of exact products by width (the operator reference only).
    operator_counts : IterationCounts or None
        The operator's preconditioned CG iterations and Lanczos steps, measured on a
        window of ``OPERATOR_WINDOW_N`` points (the operator reference only).
    line_pass_seconds_per_point : float or None
        Seconds per point of one Kalman-filter pass with the score (the exact fit on a
        line and the state-space reference only).
    seconds : float
        Wall seconds the calibration took.
    runtime_bytes : int
        Resident memory of this process when the calibration began: the interpreter with
        numpy, scipy, numba and harness loaded, and the data (``psutil``).
    """

    unit_seconds: float
    probe_n: int
    probe_seconds: float
    assembly_entries_per_second: float
    solvers: Mapping[str, SolverRate] = field(default_factory=dict)
    value_rates: Mapping[str, tuple[SolverRate, ...]] = field(default_factory=dict)
    product_cost: ProductCost | None = None
    operator_counts: IterationCounts | None = None
    line_pass_seconds_per_point: float | None = None
    seconds: float = 0.0
    runtime_bytes: int = 0

    def cholesky_seconds(self, n: int) -> float:
        """Predicted seconds of one dpotrf at n: the unit times (n / 8,192)^3."""
        return self.unit_seconds * (n / UNIT_N) ** 3

    def to_dict(self) -> dict[str, Any]:
        return {"unit": {"what": f"one dpotrf (Cholesky) at n = {UNIT_N:,} on this "
                                 "machine in the same run, predicted from a dpotrf at "
                                 f"n = {self.probe_n:,} scaled by n^3",
                         "seconds": self.unit_seconds, "probe_n": self.probe_n,
                         "probe_seconds": self.probe_seconds},
                "assembly_entries_per_second": self.assembly_entries_per_second,
                "solvers": {k: v.to_dict() for k, v in self.solvers.items()},
                "value_rates": {k: [rate.to_dict() for rate in v]
                                for k, v in self.value_rates.items()},
                "product_columns_per_second": (
                    None if self.product_cost is None
                    else self.product_cost.column_rate(PRODUCT_REPORT_WIDTH)),
                "product_cost": (None if self.product_cost is None
                                 else self.product_cost.to_dict()),
                "operator_iterations": (None if self.operator_counts is None
                                        else self.operator_counts.to_dict()),
                "line_pass_seconds_per_point": self.line_pass_seconds_per_point,
                "seconds": self.seconds, "runtime_bytes": self.runtime_bytes}


def assembly_rate(kernel: Kernel, d: int, *, rng: np.random.Generator,
                  n: int = PROBE_N) -> float:
    """Kernel entries of the lower triangle of Sigma assembled per second, at n uniform
    points of the unit cube in d dimensions
    (``harness.model.kernels.lower_fill.assemble_lower``)."""
    from harness.model.kernels.lower_fill import assemble_lower

    points = rng.random((n, d))
    assemble_lower(kernel, points[:8])  # load the compiled fill first (numba's cache)
    start = time.perf_counter()
    assemble_lower(kernel, points)
    return n * (n + 1) / 2 / max(time.perf_counter() - start, 1e-9)


def rate_solver(solver: ResolvedSolver, value: float | None, points: np.ndarray,
                kernel: Kernel, *, options: Mapping[str, Any], rng: np.random.Generator,
                sizes: tuple[int, int] = CALIBRATION_SIZES) -> SolverRate:
    """``SolverRate`` of a built-in solver at knob ``value`` on seeded subsets of
    ``points`` (module docstring). Never call it with a plugin."""
    n = points.shape[0]
    small, large = (min(size, n) for size in sizes)
    order = rng.permutation(n)
    measured: list[tuple[int, float, float, int]] = []
    arguments = solver.knob.arguments(value) | dict(options)
    for size in dict.fromkeys((small, large)):
        x = points[np.sort(order[:size])]
        start = time.perf_counter()
        fac = solver.factorize(x, kernel, kernel.theta, **arguments)
        factor = time.perf_counter() - start
        block = rng.standard_normal((size, SOLVE_COLUMNS))
        start = time.perf_counter()
        fac.solve(block)
        solve = (time.perf_counter() - start) / SOLVE_COLUMNS
        measured.append((size, factor, solve, int(fac.nbytes)))
        del fac
    (n0, t0, _, b0), (n1, t1, s1, b1) = measured[0], measured[-1]
    return SolverRate(name=solver.name, knob=solver.knob.name, value=value, n_measured=n1,
                      factor_seconds=t1, solve_seconds_per_column=s1, nbytes=b1,
                      time_exponent=_exponent(t0, t1, n0, n1, TIME_EXPONENT_RANGE),
                      memory_exponent=_exponent(b0, b1, n0, n1, MEMORY_EXPONENT_RANGE))


def product_cost(kernel: Kernel, d: int, *, rng: np.random.Generator) -> ProductCost:
    """The cost of exact products by width, at
    ``harness.references.operator.product_cost.PRODUCT_N`` points
    (``harness.references.operator.measure_product_cost``)."""
    from harness.references.operator import measure_product_cost

    return measure_product_cost(kernel, dimension=d, rng=rng)


def line_pass_rate(points: np.ndarray, kernel: Kernel, *, mean: str,
                   rng: np.random.Generator) -> float:
    """Seconds per point of one Kalman-filter pass with the analytic score
    (``harness.references.statespace``) on ``LINE_PASS_N`` of the points (at most n), on
    standard normal values (the cost does not depend on them); the second of two runs,
    so that loading the compiled kernels is not counted."""
    from harness.references.statespace import StateSpaceReference

    n = int(points.shape[0])
    m = min(n, LINE_PASS_N)
    subset = np.sort(rng.choice(n, size=m, replace=False))
    y = rng.standard_normal(m)
    reference = StateSpaceReference(points[subset], kernel)
    reference.evaluate(y, mean=mean, score=True)
    start = time.perf_counter()
    reference.with_kernel(kernel).evaluate(y, mean=mean, score=True)
    return (time.perf_counter() - start) / m


def operator_iteration_counts(points: np.ndarray, kernel: Kernel,
                              preconditioner: tuple[ResolvedSolver, float, Mapping[str, Any]],
                              *, rng: np.random.Generator) -> IterationCounts:
    """The operator's preconditioned CG iterations and Lanczos steps on the
    ``OPERATOR_WINDOW_N`` points nearest a point drawn from ``rng`` (at most n): a window
    keeps the data's density, which sets Sigma's conditioning
    (``harness.references.operator.iteration_counts``), with the preconditioner the
    plan rates, factorized on the window: the reference's own for HODLR; for Vecchia
    the pilot's largest neighbour count, as its rate (the fewest iterations, so a
    smaller count chosen by the pilot makes more)."""
    from harness.audit.operator_preconditioner import local_window
    from harness.references.operator.iteration_counts import measure_iteration_counts

    solver, value, options = preconditioner
    window = points[local_window(points, min(OPERATOR_WINDOW_N, int(points.shape[0])), rng)]
    factor = solver.factorize(window, kernel, kernel.theta,
                              **(solver.knob.arguments(value) | dict(options)))
    return measure_iteration_counts(window, kernel, factor, rng=rng)


def calibrate(points: np.ndarray, kernel: Kernel, *,
              solvers: Mapping[str, tuple[ResolvedSolver, tuple[float | None, ...],
                                          Mapping[str, Any]]],
              preconditioner: tuple[ResolvedSolver, float, Mapping[str, Any]] | None,
              rng: np.random.Generator, line_mean: str | None = None) -> Calibration:
    """The plan's rates (module docstring).

    Parameters
    ----------
    points : ndarray, shape (n, d)
        The data's points (subsets of them calibrate the solvers).
    kernel : Kernel
        The model before the fit (``harness.check.plugin_guard.trial_kernel``).
    solvers : mapping
        Built-in solvers to time, by spelling: (solver, its knob values loosest first,
        options); each value is rated, the last (the tightest) also as the solver's rate.
    preconditioner : tuple or None
        The operator reference's preconditioner (solver, knob value, options), or None
        when the plan takes no operator reference.
    rng : numpy Generator
    line_mean : str or None
        The mean model when the exact fit on a line or the state-space reference applies
        (``line_pass_rate``); None: no line pass is timed.
    """
    runtime = int(psutil.Process().memory_info().rss)
    start = time.perf_counter()
    d = int(points.shape[1])
    probe_seconds = measure_dense_rate(n=PROBE_N, repeats=PROBE_REPEATS, rng=rng).seconds
    # The solvers before the dense fill: on a cold cache the solvers' kernels compile
    # here while ``harness.check.compile_ahead`` compiles the fill on the other core
    sizes = LINE_CALIBRATION_SIZES if d == 1 else CALIBRATION_SIZES
    value_rates = {given: tuple(rate_solver(solver, value, points, kernel, options=options,
                                            rng=rng, sizes=sizes) for value in values)
                   for given, (solver, values, options) in solvers.items()}
    rates = {given: by_value[-1] for given, by_value in value_rates.items()}
    assembly = assembly_rate(kernel, d, rng=rng)
    products = counts = None
    if preconditioner is not None:
        solver, value, options = preconditioner
        rates["preconditioner"] = rate_solver(solver, value, points, kernel,
                                              options=options, rng=rng)
        products = product_cost(kernel, d, rng=rng)
        counts = operator_iteration_counts(points, kernel, preconditioner, rng=rng)
    line_rate = (None if line_mean is None
                 else line_pass_rate(points, kernel, mean=line_mean, rng=rng))
    return Calibration(unit_seconds=probe_seconds * (UNIT_N / PROBE_N) ** 3,
                       probe_n=PROBE_N, probe_seconds=probe_seconds,
                       assembly_entries_per_second=assembly, solvers=rates,
                       value_rates=value_rates, product_cost=products,
                       operator_counts=counts, line_pass_seconds_per_point=line_rate,
                       seconds=time.perf_counter() - start, runtime_bytes=runtime)
