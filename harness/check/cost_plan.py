"""A check's cost plan, made before any work: the reference of each metric, the fit plan,
the predicted peak memory and the predicted time of each stage.

The plan reuses the check's own choices, never a copy of them: the reference kind from
``harness.check.reference_kind`` (the selector of ``check`` and ``run``) and the metric
groups it serves from ``harness.audit.audit_references.metric_kinds``; the fit from
``harness.check.fit_plan.plan_fit``; the holdout and variance counts from
``harness.audit.audit_sampling``. Times come from the same-run rates of
``harness.check.plan_calibration`` and are stated in its unit, one dpotrf at n = 8,192.

Memory (bytes; 8 per double; n points in d dimensions, p kernel parameters, k probes,
m held-out points, t = n - m conditioning points, F(n) a solver's ``nbytes`` at n from
its ``SolverRate``). The stages run one after the other, so the peak is the resident
base plus the largest stage:

- base: the points, the values and the probes, 8 n (d + 1 + k);
- fit: dense, ``dense_bytes_needed(n, score, fisher, p)`` (``harness.linalg.dense_budget``,
  the model the fit plan itself checks); Vecchia, the larger of the pilot's dense fit at
  min(``pilot_n``, n), the exact-score refinement ``dense_bytes_needed(n, score)`` when
  it fits, and the Vecchia factor, 8 n m (p + 2) for m = ``FIT_NEIGHBOURS`` (values,
  neighbour indices and p derivative factors, O(n m) numbers each; the pilot is an
  L-BFGS-B fit with the score, no Fisher information); compressed, the first built-in
  solver's factor at its tightest value with the score's arrays (the fit itself uses
  HODLR at the tightest tolerance, so this is a stand-in); with ``--fixed-params`` the
  Fisher information's engine (``fit_plan.plan_fixed_fisher``): dense as above, Vecchia
  8 n m (p + 2), compressed as above;
- reference: dense, ``dense_bytes_needed(n, score)`` (the selector's model) plus the
  derivative blocks of the score, 8 p min(n, 1,024) n (``harness.audit.sides``); operator,
  the larger of the preconditioners of all points and of the conditioning points (one
  at a time: ``audit_references.OperatorReference`` releases the first before it builds
  the second) times ``PRECONDITIONER_BUILD_PEAK``, plus the probe blocks with their p
  derivative products at the operator's minimum of 16 probes, 8 n (1 + p) 16, and a
  tile per thread,
  8 x 512^2 (``harness.references.operator.schedule.column_chunk``); state space, 8 n 32
  (a state of at most 3 and its covariance, filter and smoother: covaudit's bound);
  Kronecker, 8 n 8; ladder, the solver at all points and one conditioning-point factor
  kept per knob value (``LadderReference`` caches its sides);
- one audit (``harness.audit.engine``): the larger of F(n) with the score's arrays,
  8 n (p (2k + 1) + k + 1) (``harness.audit.sides.evaluate_side``: the derivative
  products, their solves and the stacked right-hand sides), plus against the dense
  reference the exact KL divergence's two n x 256 blocks, and F(t) with three t x 64
  kriging blocks (``harness.model.cross_tiles.TILE_COLUMNS``: no n x m array is formed,
  so the caps of ``--holdout-points`` and ``--variance-points`` change time, not memory);
- timing and refit: F(n) with the score's arrays; report: the points and the holdout
  for the map, 8 n (d + 4).

The budget (``--memory-budget``) bounds these arrays. What a process monitor shows, the
resident memory of the check's process tree, is larger by the interpreters: the check,
its fork server and the one child at work each hold numpy, scipy, numba, harness and the
compiled kernels (``RESIDENT_PROCESSES`` times ``Calibration.runtime_bytes``, the check's
own resident memory when the plan was made; the child shares the server's pages, but a
monitor counts them in each). ``resident_bytes`` is that prediction.

Time (seconds; U the unit, C(n) = U (n / 8,192)^3 one dpotrf, A kernel entries per
second, R = (8,192^3 / 3) / U the dense flop rate; Golub and Van Loan, *Matrix
Computations*, 4th ed., sec. 4.2: Cholesky n^3/3 flops, its inverse 2 n^3/3):

- a dense evaluation with the score: 3 C(n) + (1 + p) n^2 / A; with the Fisher
  information 6 p C(n) more (2 p n^3 flops);
- fit: dense, ``DENSE_FIT_SCORE_EVALUATIONS`` evaluations with the score and
  ``DENSE_FIT_FISHER_EVALUATIONS`` with the Fisher information (``fit_plan``'s count);
  Vecchia, the pilot's dense fit, ``fit_max_steps`` Vecchia passes of n m^3 / 3 flops
  plus n m^2 kernel entries, and ``REFINE_MAX_STEPS`` exact-score evaluations; each
  capped by ``--fit-time-budget``; with ``--fixed-params`` one dense evaluation with the
  Fisher information, one Vecchia pass, or one compressed evaluation with its score;
- reference: dense, two factorizations (all points, conditioning points) with their
  certificates (an L L' product of n^3 / 3 flops each) and the derivative products,
  p n^2 / A + 2 p n^2 (k + 1) / R; operator, the preconditioners plus
  ``operator_evaluation_seconds`` (``harness.references.operator.product_cost``: each
  product call priced at its width, with the CG iterations and Lanczos steps measured
  on a window of the data, ``Calibration.operator_counts``) for the log-likelihood and
  score, and for kriging, CG at t points (its iterations + 2 product calls) for the mean
  (1 + q columns) and for each block of at most 64 variance points; state-space,
  ``STATESPACE_REFERENCE_PASSES`` timed Kalman passes with the score;
- one audit at each knob value: the solver's factorization at n and at t (at that
  value, ``Calibration.value_rates``) and its solves with p (2k + 1) + 1 + 2 v
  right-hand sides (against the state-space reference, whose exact control replaces the
  solver's own traces, 2k + 2 + q + v / 2), plus m t cross-covariance entries and,
  against the dense reference, the exact KL divergence's n^2 entries and n solves;
- timing: (repeats + 1) factorizations and score solves per knob value; refit:
  ``REFIT_EVALUATIONS`` of them (at most ``fit_max_steps`` + 1); report:
  ``REPORT_UNITS`` units.

A plugin's cost is not predicted (it is never called outside its child process) and
the plan says so; its stages count as unknown in the totals.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field, replace
from typing import Any

import numpy as np

from harness.audit.audit_references import metric_kinds
from harness.audit.audit_sampling import HoldoutSizeError, holdout_size, variance_positions
from harness.audit.operator_preconditioner import HODLR_TOL, PILOT_CANDIDATES
from harness.audit.solver_seeds import seed_option
from harness.check.check_options import CheckError, CheckOptions
from harness.check.fit_plan import (
    DENSE_FIT_MAX_N,
    FitPlan,
    line_applies,
    plan_fit,
    plan_fixed_fisher,
)
from harness.check.fit_stage import model_template
from harness.check.frontier_table import timing_repeats
from harness.check.plan_calibration import (
    UNIT_N,
    Calibration,
    SolverRate,
    calibrate,
    operator_iteration_counts,
    product_cost,
    rate_solver,
)
from harness.check.plugin_guard import trial_kernel
from harness.check.reference_kind import reference_kind
from harness.check.solver_lineup import LinedUpSolver, Lineup, line_up
from harness.check.vecchia_fit import FIT_NEIGHBOURS, REFINE_MAX_STEPS
from harness.linalg.dense_budget import default_memory_budget, dense_bytes_needed, total_memory
from harness.model.mean import design_matrix
from harness.references.operator import operator_evaluation_seconds
from harness.references.operator.schedule import DEFAULT_TILE
from harness.solvers.registry import resolve_solver

#: Dense evaluations of the dense fit: about 40 with the score and a few with the Fisher
#: information (``harness.check.fit_plan``, the comment on ``DENSE_FIT_MAX_N``).
DENSE_FIT_SCORE_EVALUATIONS = 40
DENSE_FIT_FISHER_EVALUATIONS = 3
#: The check report in units: 4.45 s against a same-run unit of 10.44 s for a 300-point,
#: two-solver check (``benchmarks/results/figure_drawing.json``, report.covaudit).
REPORT_UNITS = 0.43
#: Seconds per point of the Kronecker reference, and of the state-space one where no
#: Kalman pass was timed: covaudit's estimate, not measured here (O(n); it never decides
#: a plan).
STATESPACE_SECONDS_PER_POINT = 1e-4
#: The state-space reference (filter with the score, smoother, the shared probes'
#: control), priced in timed Kalman passes with the score: it took 3 to 8 of them on 65,536
#: to 1,048,576 points on a line (a development measurement of the reference alone, and
#: the stage's timestamps in a check at 1,048,576 points; not a committed file), the
#: upper end taken. The former 1e-4 s per point said 105 s there, against 14 s.
STATESPACE_REFERENCE_PASSES = 8
#: Kalman-filter passes with the score of the exact fit on a line: about 45 L-BFGS-B
#: evaluations and a Newton polish of 1 + 2p passes per evaluation (56 evaluations on
#: 100,000 points, a development measurement; ``harness.check.line_fit``), each timed
#: by the calibration (``plan_calibration.line_pass_rate``).
LINE_FIT_PASSES = 60
#: Columns of the exact KL divergence's blocks (``harness.audit.metrics.kl_divergence``).
KL_BLOCK = 256
#: Right-hand sides of one kriging block (``harness.model.cross_tiles.TILE_COLUMNS``).
KRIGING_BLOCK = 64
#: Probes of the value references' Hutch++ score (``audit_references.build_reference``).
VALUE_PROBES = 64
#: Rows per block of the dense reference's derivative products (``harness.audit.sides``).
DERIVATIVE_ROWS = 1024
#: Probes per block of the operator reference (``operator_evaluate``'s default).
OPERATOR_PROBE_BATCH = 16
#: Probes the operator reference is priced at: ``operator_evaluate``'s ``min_probes``,
#: where it stops when its SE target is met, as it did with the default preconditioner
#: (HODLR at tol 1e-10) at 16,384 points (``benchmarks/results/operator_preconditioner.json``:
#: 16 probes, 6 iterations).
OPERATOR_MIN_PROBES = 16
#: The operator's preconditioner at all points, priced in factorizations: its own and its
#: traces (derivative compression and solves), about one more (15.3 s of traces against
#: 13.6 s of factorization at 16,384 points, ``operator_preconditioner.json``).
PRECONDITIONER_PASSES = 2
#: The operator reference's peak over its preconditioner's own size (``nbytes``): the
#: factorization's working arrays and the operator's blocks on top of the factor
#: (1.25 GB peak against 0.76 GB for HODLR at tol 1e-10 at 16,384 points,
#: ``benchmarks/results/operator_preconditioner.json``).
PRECONDITIONER_BUILD_PEAK = 1.6
#: Evaluations the refit is priced at: the start and up to two Fisher-scoring steps. It
#: starts at the reference's estimate, so a stochastic score stops at its noise floor
#: after the first step and a deterministic one after a step or two (a check of 100,000
#: points on a line made 2 evaluations, a development measurement); --fit-max-steps + 1
#: is the cap the plan's detail also names.
REFIT_EVALUATIONS = 3
#: Processes alive at a check's peak, each with its own interpreter and libraries: the
#: check, its fork server and one child (module docstring).
RESIDENT_PROCESSES = 3
STAGES: tuple[str, ...] = ("fit", "reference", "audits", "timing", "refit", "report")


@dataclass(frozen=True)
class StagePlan:
    """One stage's predicted seconds and peak bytes (None: not predicted, ``detail``
    says why). ``solver``, ``values`` and ``seeds`` describe an audit stage."""

    stage: str
    seconds: float | None
    peak_bytes: int | None
    detail: str
    solver: str | None = None
    values: int = 0
    seeds: int = 0

    def to_dict(self, unit_seconds: float) -> dict[str, Any]:
        out: dict[str, Any] = {
            "stage": self.stage, "seconds": self.seconds,
            "units": None if self.seconds is None else self.seconds / unit_seconds,
            "peak_bytes": self.peak_bytes, "detail": self.detail}
        if self.solver is not None:
            out |= {"solver": self.solver, "knob_values": self.values, "seeds": self.seeds,
                    "audits": self.values * self.seeds}
        return out


@dataclass(frozen=True)
class CostPlan:
    """What a check will do and what it will cost (module docstring)."""

    n: int
    d: int
    n_params: int
    reference: str
    reference_warnings: tuple[str, ...]
    reference_by_metric: Mapping[str, str | None]
    n_holdout: int
    n_variance_points: int
    fit: FitPlan | None
    stages: tuple[StagePlan, ...]
    base_bytes: int
    memory_budget: int
    calibration: Calibration
    notes: tuple[str, ...] = field(default_factory=tuple)
    #: With --fixed-params (``fit`` None): where the Fisher information at them is
    #: computed (``fit_plan.plan_fixed_fisher``).
    fixed_fisher: FitPlan | None = None

    @property
    def peak_stage(self) -> StagePlan:
        return max(self.stages, key=lambda s: s.peak_bytes or 0)

    @property
    def peak_bytes(self) -> int:
        return self.base_bytes + int(self.peak_stage.peak_bytes or 0)

    @property
    def resident_bytes(self) -> int:
        """Predicted resident memory of the process tree at the peak (module docstring)."""
        return self.peak_bytes + RESIDENT_PROCESSES * self.calibration.runtime_bytes

    @property
    def fits_budget(self) -> bool:
        return self.peak_bytes <= self.memory_budget

    @property
    def total_seconds(self) -> float:
        """The sum of the predicted stages (unknown ones count 0; ``unknown`` says so)."""
        return float(sum(s.seconds or 0.0 for s in self.stages))

    @property
    def unknown(self) -> tuple[str, ...]:
        return tuple(s.stage + (f" {s.solver}" if s.solver else "") for s in self.stages
                     if s.seconds is None)

    def to_dict(self) -> dict[str, Any]:
        unit = self.calibration.unit_seconds
        return {
            "n": self.n, "d": self.d, "n_params": self.n_params,
            "reference": self.reference,
            "reference_by_metric": {k: {"kind": v} for k, v in
                                    self.reference_by_metric.items()},
            "reference_warnings": list(self.reference_warnings),
            "n_holdout": self.n_holdout, "n_variance_points": self.n_variance_points,
            "fit": None if self.fit is None else self.fit.to_dict(),
            "fixed_fisher": (None if self.fixed_fisher is None
                             else self.fixed_fisher.to_dict()),
            "stages": [s.to_dict(unit) for s in self.stages],
            "base_bytes": self.base_bytes, "peak_bytes": self.peak_bytes,
            "resident_bytes": self.resident_bytes,
            "peak_stage": self.peak_stage.stage, "memory_budget_bytes": self.memory_budget,
            "fits_budget": self.fits_budget, "total_seconds": self.total_seconds,
            "total_units": self.total_seconds / unit, "not_predicted": list(self.unknown),
            "calibration": self.calibration.to_dict(), "notes": list(self.notes)}


@dataclass(frozen=True)
class _Sizes:
    n: int
    d: int
    p: int
    k: int
    m: int
    v: int
    mean_columns: int
    line: bool          # 1D points, a half-integer Matern kernel (``fit_plan.line_applies``)

    @property
    def t(self) -> int:
        return self.n - self.m


def _flop_seconds(cal: Calibration, flops: float) -> float:
    """Seconds of ``flops`` dense flops at the unit's rate, ``UNIT_N``^3 / 3 flops per unit."""
    return flops / (UNIT_N ** 3 / 3.0) * cal.unit_seconds


def _dense_evaluation(cal: Calibration, n: int, p: int, *, fisher: bool) -> float:
    seconds = 3 * cal.cholesky_seconds(n) + (1 + p) * n * n / cal.assembly_entries_per_second
    return seconds + (6 * p * cal.cholesky_seconds(n) if fisher else 0.0)


def _score_bytes(n: int, p: int, k: int) -> int:
    return 8 * n * (p * (2 * k + 1) + k + 1)


def _scored_evaluation(rate: SolverRate, s: _Sizes) -> tuple[float, int]:
    """One evaluation by a compressed solver with its Hutch++ score at n: seconds of its
    factorization and p (2k + 1) + 1 solves, and bytes of its factor with the score's
    arrays."""
    return (rate.seconds_at(s.n) + rate.solve_seconds_at(s.n, s.p * (2 * s.k + 1) + 1),
            rate.nbytes_at(s.n) + _score_bytes(s.n, s.p, s.k))


def _budget(options: CheckOptions) -> int:
    return (default_memory_budget() if options.memory_budget is None
            else int(options.memory_budget))


def _vecchia_pass_seconds(s: _Sizes, cal: Calibration) -> float:
    """One pass of the fit's Vecchia likelihood with its score and Fisher information:
    n m^3 / 3 flops of the local factorizations and n m^2 kernel entries."""
    m = FIT_NEIGHBOURS
    return _flop_seconds(cal, s.n * m ** 3 / 3.0) + s.n * m * m / cal.assembly_entries_per_second


def _fixed_fisher_stage(s: _Sizes, plan: FitPlan, cal: Calibration,
                        tight: SolverRate | None) -> StagePlan:
    """--fixed-params: the Fisher information at them, by ``plan``'s engine
    (``fit_plan.plan_fixed_fisher``)."""
    if plan.engine == "dense":
        return StagePlan("fit", _dense_evaluation(cal, s.n, s.p, fisher=True),
                         dense_bytes_needed(s.n, fisher=True, n_params=s.p),
                         "fixed parameters: the dense Fisher information at them")
    if plan.engine == "vecchia":
        return StagePlan("fit", _vecchia_pass_seconds(s, cal),
                         8 * s.n * FIT_NEIGHBOURS * (s.p + 2),
                         f"fixed parameters: the Vecchia Fisher information at them "
                         f"(m = {FIT_NEIGHBOURS})")
    if tight is None:
        return StagePlan("fit", None, None, "fixed parameters: the Fisher information by a "
                                            "plugin's Hutch++: not predicted")
    return StagePlan("fit", *_scored_evaluation(tight, s),
                     "fixed parameters: the Fisher information by Hutch++ at the tightest "
                     "tolerance")


def _fit_stage(s: _Sizes, options: CheckOptions, fit: FitPlan | None, cal: Calibration,
               tight: SolverRate | None, *, fixed: FitPlan | None) -> StagePlan:
    budget = options.fit_time_budget
    if fixed is not None:
        return _fixed_fisher_stage(s, fixed, cal, tight)
    if fit is None:
        raise ValueError("a plan without a fit needs the fixed parameters' Fisher plan")
    if fit.engine == "dense":
        seconds = (DENSE_FIT_SCORE_EVALUATIONS * _dense_evaluation(cal, s.n, s.p, fisher=False)
                   + DENSE_FIT_FISHER_EVALUATIONS * _dense_evaluation(cal, s.n, s.p,
                                                                      fisher=True))
        return StagePlan("fit", min(seconds, budget),
                         dense_bytes_needed(s.n, score=True, fisher=True, n_params=s.p),
                         f"dense fit, about {DENSE_FIT_SCORE_EVALUATIONS} evaluations with "
                         f"the score and {DENSE_FIT_FISHER_EVALUATIONS} with the Fisher "
                         f"information, at most --fit-time-budget {budget:g} s")
    if fit.engine == "statespace":
        rate = cal.line_pass_seconds_per_point
        if rate is None:
            return StagePlan("fit", None, 8 * s.n * 32, "exact fit on the line: not timed")
        seconds = LINE_FIT_PASSES * s.n * rate
        return StagePlan("fit", min(seconds, budget), 8 * s.n * 32,
                         f"exact fit on the line (Kalman filter), about {LINE_FIT_PASSES} "
                         f"O(n) passes with the score, at most --fit-time-budget {budget:g} s")
    if fit.engine == "vecchia":
        pilot = min(options.pilot_n, s.n)
        m = FIT_NEIGHBOURS
        passes = options.fit_max_steps * _vecchia_pass_seconds(s, cal)
        refine = (REFINE_MAX_STEPS * _dense_evaluation(cal, s.n, s.p, fisher=False)
                  if fit.exact_score_fits else 0.0)
        seconds = (DENSE_FIT_SCORE_EVALUATIONS * _dense_evaluation(cal, pilot, s.p, fisher=False)
                   + DENSE_FIT_FISHER_EVALUATIONS * _dense_evaluation(cal, pilot, s.p,
                                                                      fisher=True)
                   + passes + refine)
        peak = max(dense_bytes_needed(pilot, score=True),
                   dense_bytes_needed(s.n, score=True) if fit.exact_score_fits else 0,
                   8 * s.n * m * (s.p + 2))
        return StagePlan("fit", min(seconds, budget), peak,
                         f"at-scale fit: dense pilot on {pilot:,} points, "
                         f"{options.fit_max_steps} Vecchia passes (m = {m}), "
                         + (f"{REFINE_MAX_STEPS} exact-score steps" if fit.exact_score_fits
                            else "no exact-score steps (over the budget)")
                         + f", at most --fit-time-budget {budget:g} s")
    if tight is None:
        return StagePlan("fit", None, None, "compressed fit by a plugin: not predicted")
    steps = options.fit_max_steps
    seconds, nbytes = _scored_evaluation(tight, s)
    return StagePlan("fit", min(steps * seconds, budget), nbytes,
                     f"compressed fit, {steps} Fisher-scoring steps with {tight.name}, at "
                     f"most --fit-time-budget {budget:g} s")


def _reference_stage(s: _Sizes, kind: str, options: CheckOptions, cal: Calibration,
                     first: SolverRate | None, n_values: int) -> StagePlan:
    if kind == "dense":
        seconds = 2 * (2 * cal.cholesky_seconds(s.n) + s.n * s.n / cal.assembly_entries_per_second)
        seconds += (s.p * s.n * s.n / cal.assembly_entries_per_second
                    + _flop_seconds(cal, 2.0 * s.p * s.n * s.n * (s.k + 1)))
        return StagePlan("reference", seconds, dense_bytes_needed(s.n, score=True)
                         + 8 * s.p * min(s.n, DERIVATIVE_ROWS) * s.n,
                         "dense Cholesky of all points and of the conditioning points, "
                         "certified, in a child process")
    if kind == "operator":
        pre = cal.solvers["preconditioner"]
        probes = OPERATOR_MIN_PROBES
        if cal.product_cost is None:
            raise ValueError("an operator reference's plan needs the product cost in its "
                             "calibration")
        cost, counts = cal.product_cost, cal.operator_counts
        if counts is None:
            raise ValueError("an operator reference's plan needs the operator's iteration "
                             "counts in its calibration")
        cg, calls = counts.cg_iterations, counts.cg_iterations + 2
        variance_blocks = [min(KRIGING_BLOCK, s.v - start)
                           for start in range(0, s.v, KRIGING_BLOCK)]
        seconds = (PRECONDITIONER_PASSES * pre.seconds_at(s.n) + pre.seconds_at(s.t)
                   + operator_evaluation_seconds(s.n, cost, n_params=s.p,
                                                 mean_columns=s.mean_columns, probes=probes,
                                                 probe_batch=OPERATOR_PROBE_BATCH,
                                                 steps=cg,
                                                 lanczos_steps=counts.lanczos_steps)
                   + cost.product_seconds(s.t, 1 + s.mean_columns, calls=calls)
                   + sum(cost.product_seconds(s.t, width, calls=calls)
                         for width in variance_blocks))
        block = 8 * s.n * (1 + s.p) * probes + 8 * DEFAULT_TILE ** 2
        # one preconditioner at a time: all points', then the conditioning points'
        held = PRECONDITIONER_BUILD_PEAK * max(pre.nbytes_at(s.n), pre.nbytes_at(s.t))
        return StagePlan("reference", seconds, int(held) + block,
                         f"exact operator, preconditioned by {options.preconditioner} "
                         f"({pre.knob} {pre.value:g}), {probes} probes (more if its SE "
                         f"target needs them), about {cg} CG iterations and "
                         f"{counts.lanczos_steps} Lanczos steps per solve (measured on "
                         f"{counts.n:,} points)")
    if kind in ("statespace", "kronecker"):
        nbytes = 8 * s.n * (32 if kind == "statespace" else 8)
        rate = cal.line_pass_seconds_per_point if kind == "statespace" else None
        if rate is None:
            return StagePlan("reference", STATESPACE_SECONDS_PER_POINT * s.n, nbytes,
                             f"{kind} reference, O(n)")
        return StagePlan("reference", STATESPACE_REFERENCE_PASSES * s.n * rate, nbytes,
                         f"statespace reference, O(n): about {STATESPACE_REFERENCE_PASSES} "
                         "Kalman passes with the score")
    if first is None:
        return StagePlan("reference", None, None, "ladder of a plugin: not predicted")
    return StagePlan("reference", n_values * (first.seconds_at(s.n) + first.seconds_at(s.t)),
                     first.nbytes_at(s.n) + n_values * first.nbytes_at(s.t),
                     f"ladder: {first.name} at tol / {options.ladder_factor:g}, per knob "
                     "value (priced at the tightest measured value)")


def _audit_stage(s: _Sizes, lined: LinedUpSolver, kind: str, options: CheckOptions,
                 cal: Calibration, rate: SolverRate | None) -> StagePlan:
    seeds = options.solver_seeds if seed_option(lined.solver.factory) is not None else 1
    values = len(lined.values)
    if rate is None:
        return StagePlan("audits", None, None,
                         f"solver {lined.given!r} runs only in child processes: its cost is "
                         "not predicted", solver=lined.given, values=values, seeds=seeds)
    paired = kind in ("dense", "ladder")
    k = s.k if paired else max(VALUE_PROBES, s.k)
    if kind == "statespace":
        # the Kalman filter's exact shared-probe control (harness.audit.line_trace_control):
        # per probe a solve and a length-scale derivative product (the affine variance and
        # nugget share the one solve), 1 + q solves for the GLS and the quadratics, and
        # the variances by W^-1 (half a solve each); never the solver's own Hutch++
        columns = 2 * k + 2 + s.mean_columns + s.v / 2
    else:
        columns = s.p * (2 * k + 1) + 1 + 2 * s.v
    # the means' cross-covariance tiles; on a line one exact O(n) product instead
    # (harness.references.line_products.LineCrossProducts)
    cross = 0.0 if s.line else s.m * s.t / cal.assembly_entries_per_second

    def one_audit(at: SolverRate) -> float:
        seconds = (at.seconds_at(s.n) + at.seconds_at(s.t)
                   + at.solve_seconds_at(s.n, columns) + cross)
        if kind == "dense":
            seconds += (s.n * s.n / cal.assembly_entries_per_second
                        + at.solve_seconds_at(s.n, s.n))
        return seconds

    # each knob value at its own rate (the tightest alone when the values were not rated)
    by_value = cal.value_rates.get(lined.given) or (rate,) * values
    each = [one_audit(at) for at in by_value]
    full = rate.nbytes_at(s.n) + _score_bytes(s.n, s.p, k)
    if kind == "dense":
        full += 2 * 8 * s.n * KL_BLOCK
    train = rate.nbytes_at(s.t) + 3 * 8 * s.t * KRIGING_BLOCK
    span = (f"{each[0]:.3g} s" if len(each) == 1 else
            f"{min(each):.3g} to {max(each):.3g} s")
    return StagePlan("audits", seeds * sum(each), max(full, train),
                     f"{values} knob values x {seeds} seeds of {lined.given!r}, {span} each "
                     f"({rate.knob} {by_value[0].value:g} to {rate.value:g})",
                     solver=lined.given, values=values, seeds=seeds)


def _timing_stage(s: _Sizes, lineup: Lineup, options: CheckOptions, rates: Mapping[
        str, SolverRate | None], kind: str, cal: Calibration) -> StagePlan:
    repeats = timing_repeats(options, s.n, len(options.solver_names))
    if not repeats:
        return StagePlan("timing", 0.0, 0, "no separate timing (one solver: its audit's "
                                           "log-likelihood time)")
    seconds, peak, unknown = 0.0, 0, []
    for lined in lineup.solvers:
        rate = rates.get(lined.given)
        if rate is None:
            unknown.append(lined.given)
            continue
        one, nbytes = _scored_evaluation(rate, s)
        seconds += len(lined.values) * (repeats + 1) * one
        peak = max(peak, nbytes)
    if kind == "dense":
        seconds += (repeats + 1) * _dense_evaluation(cal, s.n, s.p, fisher=False)
        peak = max(peak, dense_bytes_needed(s.n, score=True))
    return StagePlan("timing", None if unknown else seconds, peak,
                     f"{repeats} timed fit evaluations per knob value"
                     + (f" (not predicted for {', '.join(unknown)})" if unknown else ""))


def _refit_stage(s: _Sizes, options: CheckOptions, rate: SolverRate | None) -> StagePlan:
    if not options.refit or options.fixed_params is not None:
        return StagePlan("refit", 0.0, 0, "no refit")
    if rate is None:
        return StagePlan("refit", None, None, "refit by a plugin: not predicted")
    steps = min(REFIT_EVALUATIONS, options.fit_max_steps + 1)
    seconds, nbytes = _scored_evaluation(rate, s)
    return StagePlan("refit", steps * seconds, nbytes,
                     f"about {steps} evaluations with the pick, at most "
                     f"{options.fit_max_steps + 1} (priced at the tightest value)")


def _preconditioner(options: CheckOptions) -> tuple[Any, float, dict[str, Any]]:
    """The operator reference's preconditioner to calibrate: HODLR at ``HODLR_TOL`` or
    Vecchia at the pilot's largest neighbour count (the costliest it may choose)."""
    if options.preconditioner == "vecchia":
        return resolve_solver("vecchia"), float(max(PILOT_CANDIDATES)), {}
    return resolve_solver("hodlr"), HODLR_TOL, {"leaf_size": options.leaf_size}


def calibrate_for(points: np.ndarray, y: np.ndarray, options: CheckOptions, lineup: Lineup,
                  *, operator: bool, on_line: bool, rng: np.random.Generator) -> Calibration:
    """The calibration of a check: the built-in solvers under test at each of their knob
    values and, when the plan takes the exact operator (``operator``), its preconditioner,
    the product rate and the operator's iteration counts. A plan without the operator
    never runs them, so it does not time them either: on a fresh install that would
    compile the product kernel, about 13 s, for nothing. ``plan_check`` adds them to a
    calibration that lacks them when its plan takes the operator (an alternative priced
    by ``budget_refusal``, for example). ``on_line``: the points and kernel are those of
    the exact fit on a line and of the state-space reference
    (``fit_plan.line_applies``), whose Kalman pass is then timed: both are priced in
    passes."""
    kernel = _kernel(points, y, options)
    solvers = {lined.given: (lined.solver, tuple(lined.values), dict(lined.options))
               for lined in lineup.solvers if lined.solver.origin == "builtin"}
    return calibrate(points, kernel, solvers=solvers,
                     preconditioner=_preconditioner(options) if operator else None, rng=rng,
                     line_mean=options.mean if on_line else None)


def _with_operator_rates(calibration: Calibration, points: np.ndarray, y: np.ndarray,
                         options: CheckOptions) -> Calibration:
    """``calibration`` with the operator's rates for ``options``: its preconditioner and
    iteration counts (measured here unless the calibration rated this preconditioner) and
    the product rate."""
    solvers, products = calibration.solvers, calibration.product_cost
    counts = calibration.operator_counts
    rated = solvers.get("preconditioner")
    preconditioner = _preconditioner(options)
    solver, value, solver_options = preconditioner
    same = rated is not None and rated.name == solver.name
    if same and products is not None and counts is not None:
        return calibration
    kernel, rng = _kernel(points, y, options), np.random.default_rng(options.seed)
    if not same:
        solvers = {**solvers, "preconditioner": rate_solver(
            solver, value, points, kernel, options=solver_options, rng=rng)}
    if not same or counts is None:
        counts = operator_iteration_counts(points, kernel, preconditioner, rng=rng)
    if products is None:
        products = product_cost(kernel, int(points.shape[1]), rng=rng)
    return replace(calibration, solvers=solvers, product_cost=products,
                   operator_counts=counts)


def _kernel(points: np.ndarray, y: np.ndarray, options: CheckOptions) -> Any:
    template = model_template(options, int(points.shape[1]))
    return trial_kernel(options.kernel, options.shape, options.fixed_params, template,
                        points, y, mean=options.mean)


def _sizes(points: np.ndarray, options: CheckOptions, n_params: int, *, line: bool
           ) -> _Sizes:
    n, d = int(points.shape[0]), int(points.shape[1])
    try:
        m = holdout_size(n, options.holdout, cap=options.holdout_points)
        v = int(variance_positions(m, options.variance_points, seed=options.seed).size)
    except HoldoutSizeError as exc:
        raise CheckError(f"--{exc.option.replace('_', '-')}: {exc}") from None
    mean_columns = int(design_matrix(np.zeros((1, d)), options.mean).shape[1])
    return _Sizes(n=n, d=d, p=n_params, k=options.probes, m=m, v=v,
                  mean_columns=mean_columns, line=line)


def plan_check(points: np.ndarray, y: np.ndarray, options: CheckOptions, *,
               calibration: Calibration | None = None, lineup: Lineup | None = None,
               rng: np.random.Generator | None = None) -> CostPlan:
    """The cost plan of a check of ``points`` and ``y`` with ``options``.

    Parameters
    ----------
    points, y : ndarray
        The validated data.
    options : CheckOptions
    calibration : Calibration, optional
        Rates from ``calibrate_for`` (measured here when None, a few seconds).
    lineup : Lineup, optional
        The solvers (``line_up(options, n)`` when None).
    rng : numpy Generator, optional
        The calibration's subsets and probes (``default_rng(options.seed)`` when None).

    Raises
    ------
    CheckError
        An option that the check itself would refuse (one line naming it).
    """
    n, d = int(points.shape[0]), int(points.shape[1])
    lineup = line_up(options, n) if lineup is None else lineup
    template = model_template(options, d)
    on_line = line_applies(d, template)
    sizes = _sizes(points, options, template.n_params, line=on_line)
    kind, ref_warnings = reference_kind(options, points, template)
    if calibration is None:
        calibration = calibrate_for(points, y, options, lineup, operator=kind == "operator",
                                    on_line=on_line, rng=rng if rng is not None
                                    else np.random.default_rng(options.seed))
    if kind == "operator":
        calibration = _with_operator_rates(calibration, points, y, options)
    rates: dict[str, SolverRate | None] = {
        lined.given: calibration.solvers.get(lined.given) for lined in lineup.solvers}
    first = rates[lineup.solvers[0].given]
    dense_max_n = (DENSE_FIT_MAX_N if options.dense_fit_max_n is None
                   else options.dense_fit_max_n)
    fit = fixed = None
    if options.fixed_params is not None:
        fixed = plan_fixed_fisher(n, template.n_params, family=template.family,
                                  memory_budget=options.memory_budget, dense_max_n=dense_max_n)
    else:
        fit = plan_fit(n, template.n_params, family=template.family,
                       memory_budget=options.memory_budget,
                       time_budget=options.fit_time_budget, dense_max_n=dense_max_n,
                       on_line=on_line)
    tight = next((r for r in rates.values() if r is not None), None)
    stages = [_fit_stage(sizes, options, fit, calibration, tight, fixed=fixed),
              _reference_stage(sizes, kind, options, calibration, first,
                               len(lineup.solvers[0].values)),
              *(_audit_stage(sizes, lined, kind, options, calibration, rates[lined.given])
                for lined in lineup.solvers),
              _timing_stage(sizes, lineup, options, rates, kind, calibration),
              _refit_stage(sizes, options, first),
              StagePlan("report", REPORT_UNITS * calibration.unit_seconds,
                        8 * n * (d + 4), "check.json and check.html with its figures")]
    budget = _budget(options)
    return CostPlan(n=n, d=d, n_params=template.n_params, reference=kind,
                    reference_warnings=tuple(ref_warnings),
                    reference_by_metric=metric_kinds(kind), n_holdout=sizes.m,
                    n_variance_points=sizes.v, fit=fit, fixed_fisher=fixed,
                    stages=tuple(stages),
                    base_bytes=8 * n * (d + 1 + sizes.k), memory_budget=budget,
                    calibration=calibration)


def _gib(nbytes: float) -> str:
    return f"{nbytes / 2**30:.3g}"


def _alternatives(plan: CostPlan, options: CheckOptions) -> Sequence[tuple[str,
                                                                           CheckOptions]]:
    """Options that could lower the peak, each as its flag text and the changed options."""
    out: list[tuple[str, CheckOptions]] = []
    hodlr_preconditioned = options.preconditioner != "vecchia"
    if plan.reference not in ("operator", "statespace", "kronecker"):
        out.append(("--reference operator", replace(options, reference="operator")))
        if hodlr_preconditioned:
            out.append(("--reference operator --preconditioner vecchia",
                        replace(options, reference="operator", preconditioner="vecchia")))
    elif plan.reference == "operator" and hodlr_preconditioned:
        out.append(("--preconditioner vecchia", replace(options, preconditioner="vecchia")))
    if options.probes > 4:
        out.append((f"--probes {max(4, options.probes // 4)}",
                    replace(options, probes=max(4, options.probes // 4))))
    if any(chosen is not None and chosen.engine == "dense"
           for chosen in (plan.fit, plan.fixed_fisher)):
        out.append(("--dense-fit-max-n 0", replace(options, dense_fit_max_n=0)))
    if plan.n_holdout > 100:
        out.append(("--holdout-points 100", replace(options, holdout_points=100)))
    if plan.n_variance_points > 64:
        out.append(("--variance-points 64", replace(options, variance_points=64)))
    return out


def _budget_for(peak_bytes: int) -> float:
    """The ``--memory-budget`` (GiB, rounded up to 3 significant digits) that holds a peak
    with 10% to spare."""
    need = max(peak_bytes, 1) * 1.1 / 2**30
    scale = 10.0 ** (2 - math.floor(math.log10(need)))
    return math.ceil(need * scale) / scale


def budget_refusal(plan: CostPlan, points: np.ndarray, y: np.ndarray,
                   options: CheckOptions, *, lineup: Lineup | None = None) -> str | None:
    """None when ``plan`` fits its memory budget, else the one-line refusal: the peak,
    its stage, the budget, and the options that would make the plan fit (each re-planned
    with the same calibration, the operator's rates added where it lacks them), and a larger
    ``--memory-budget`` where this machine has that much memory. Where it has not and no
    option alone fits, the option that lowers the peak most with the budget it needs; where
    nothing fits this machine, the line says so. Never advice that cannot be followed."""
    if plan.fits_budget:
        return None
    fixes: list[str] = []
    machine = total_memory()
    smallest: tuple[int, str] = (plan.peak_bytes, "")
    alternatives = _alternatives(plan, options)
    for flag, changed in alternatives:
        try:
            other = plan_check(points, y, changed, calibration=plan.calibration,
                               lineup=lineup)
        except CheckError:
            continue
        if other.fits_budget:
            fixes.append(flag)
        smallest = min(smallest, (other.peak_bytes, flag))
    if _budget_for(plan.peak_bytes) * 2**30 <= machine:
        fixes.append(f"--memory-budget {_budget_for(plan.peak_bytes):g}")
    elif not fixes and smallest[1] and _budget_for(smallest[0]) * 2**30 <= machine:
        # Neither an option alone nor a budget this machine has fits, but the option that
        # lowers the peak most does, with such a budget.
        fixes.append(f"{smallest[1]} --memory-budget {_budget_for(smallest[0]):g}")
    over = (f"the plan's predicted peak memory, {_gib(plan.peak_bytes)} GiB (stage "
            f"{plan.peak_stage.stage}"
            + (f" {plan.peak_stage.solver}" if plan.peak_stage.solver else "")
            + f"), exceeds the memory budget of {_gib(plan.memory_budget)} GiB")
    if not fixes:
        tried = ", ".join(flag for flag, _ in alternatives)
        return (f"{over} and this machine's {_gib(machine)} GiB"
                + (f", and none of {tried} brings it within the budget" if tried else "")
                + ": run it on a machine with more memory")
    what = ("one of " if len(fixes) > 1 else "") + ", ".join(fixes)
    return f"{over}; it would fit with {what}"
