"""The references the audit engine compares a solver with, behind one interface.

Each gives ``ReferenceSides`` at a tolerance: the likelihood pieces of all n points, the
kriging of the held-out points conditioned on the other points, a Sigma product on those
points and the reference log-likelihood's own standard error (0 when exact).

* ``DenseReference``: the certified dense Cholesky (first in the reference order of
  DEVELOPERS.md), the same
  at every tolerance; certified when the scaled residual of both factorizations (all
  points, the kriging conditioning points) is below LAPACK's pass ratio 30.
* ``LadderReference``: the solver under test at tol / ladder factor, seed index 0: a
  stand-in, never exact (``engine.ReferenceInfo.exact`` is False), so a verdict against
  it is at best ``unresolved``.
* ``OperatorReference``: the exact operator (``harness.references.operator``), when
  installed (``operator_available``); it reports values with standard errors and CG
  bounds (``ReferenceValues``), not a factorization.
* ``StructuredReference``: the exact state-space (Kalman) or Kronecker reference, as
  values (log-likelihood and score, exact). The state-space kind also kriges the
  held-out points exactly and gives the exact side of shared probes for the solver's
  score traces (``harness.audit.line_trace_control``); the Kronecker kind offers
  neither, so the kriging metric is not measured against it.

``build_reference`` builds the kind that ``harness.audit.reference_choice`` chose, for
``check`` and for every ``run`` task alike.
"""

from __future__ import annotations

import importlib.util
import time
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import TYPE_CHECKING

import numpy as np

from harness.audit.dense_sides import DenseSides, dense_sides
from harness.audit.engine import (
    AuditData,
    PairedReference,
    ReferenceInfo,
    ReferenceSides,
    ReferenceValue,
    ReferenceValues,
    ValueReference,
)
from harness.audit.line_trace_control import line_trace_control
from harness.audit.operator_preconditioner import (
    PreconditionerSpec,
    build_operator_preconditioner,
)
from harness.audit.sides import KrigingSide, evaluate_side, kriging_side
from harness.audit.solver_seeds import seeded_options, solver_seed
from harness.infra.child_process import run_stage
from harness.infra.memory_release import release_freed_memory
from harness.likelihood.trace.control import TraceControl
from harness.references import CERTIFICATE_THRESHOLD
from harness.references.operator.products import KernelOperator
from harness.solvers.registry import ResolvedSolver

if TYPE_CHECKING:
    from harness.references.operator.reference import OperatorEvaluation

OPERATOR_MODULE = "harness.references.operator"


def operator_available() -> bool:
    """Whether the exact operator reference package is installed."""
    try:
        return importlib.util.find_spec(OPERATOR_MODULE) is not None
    except ModuleNotFoundError:
        return False


#: What to try when the dense reference crashes (the one-line message of ``run_stage``).
DENSE_CRASH_ADVICE = ("fewer BLAS threads (OPENBLAS_NUM_THREADS=1), a smaller "
                      "--memory-budget, or --reference operator (the exact operator)")


class DenseReference:
    """The certified dense Cholesky of all points and of the kriging conditioning points.

    With ``isolate`` (``check``) the factorizations run in a child process
    (``harness.infra.child_process``): a native crash in the BLAS becomes
    ``StageCrashed`` naming the stage and n, not a dead process. A ``run`` task passes
    ``isolate=False``: its worker process is already that boundary. The Sigma product on
    the conditioning points (the efficiency criteria) is the exact product from kernel
    entries (``KernelOperator``), not the factor.
    """

    def __init__(self, data: AuditData, *, memory_budget: int | None = None,
                 isolate: bool = True) -> None:
        sides: DenseSides = (
            run_stage(dense_sides, data.points, data.y, data.kernel, mean=data.mean,
                      holdout=data.holdout, probes=data.probes, memory_budget=memory_budget,
                      variance_at=data.variance_positions, stage="the dense reference",
                      n=int(data.y.size),
                      advice=DENSE_CRASH_ADVICE)
            if isolate else
            dense_sides(data.points, data.y, data.kernel, mean=data.mean,
                        holdout=data.holdout, probes=data.probes, memory_budget=memory_budget,
                        variance_at=data.variance_positions))
        cert_full, cert_t = sides.certificate_full, sides.certificate_train
        self.certificate = max(cert_full, cert_t)
        certified = bool(cert_full < CERTIFICATE_THRESHOLD and cert_t < CERTIFICATE_THRESHOLD)
        self.info = ReferenceInfo(
            "dense", certified,
            f"dense Cholesky, scaled residual {cert_full:.3g} (all points), {cert_t:.3g} "
            f"(kriging conditioning points); passes below {CERTIFICATE_THRESHOLD:g}")
        train_product = KernelOperator(data.points[data.train], data.kernel, progress=False)
        self._sides = ReferenceSides(full=sides.full, kriging=sides.kriging,
                                     train_matvec=train_product.matvec,
                                     loglik_seconds=sides.full.loglik_seconds, exact=True)

    def sides(self, tol: float) -> ReferenceSides:
        return self._sides


class LadderReference:
    """The solver under test at tol / ``factor`` (seed index 0), per tolerance."""

    def __init__(self, data: AuditData, solver: ResolvedSolver, *, factor: float,
                 base_seed: int, options: Mapping[str, object] | None = None) -> None:
        if not factor > 1:
            raise ValueError(f"--ladder-factor: expected a number > 1, got {factor!r}")
        self.data, self.solver, self.factor = data, solver, float(factor)
        self.options = seeded_options(solver.factory, options or {},
                                      solver_seed(base_seed, 0))
        self.info = ReferenceInfo("ladder", True,
                                  f"{solver.name} at tol / {self.factor:g} (a stand-in, "
                                  "not exact)")
        self._cache: dict[float, ReferenceSides] = {}

    def sides(self, tol: float) -> ReferenceSides:
        tight = tol / self.factor
        if tight in self._cache:
            return self._cache[tight]
        d = self.data
        x, kernel, train = d.points, d.kernel, d.train
        t0 = time.perf_counter()
        fac = self.solver.factorize(x, kernel, kernel.theta, tol=tight, **self.options)
        full = evaluate_side(f"{self.solver.name} {tight:g}", fac, x, d.y, kernel,
                             mean=d.mean, probes=d.probes,
                             factor_seconds=time.perf_counter() - t0)
        del fac
        fac_t = self.solver.factorize(x[train], kernel, kernel.theta, tol=tight,
                                      **self.options)
        ks = kriging_side(f"{self.solver.name} {tight:g}", fac_t, x[train], d.y[train],
                          kernel, x[d.holdout], mean=d.mean, variance_at=d.variance_positions)
        out = ReferenceSides(full=full, kriging=ks, train_matvec=fac_t.matvec,
                             loglik_seconds=full.loglik_seconds)
        self._cache[tight] = out
        return out


class OperatorReference:
    """The exact operator reference (``harness.references.operator``): log-likelihood and
    score of all points with their SEs and CG bound, kriging of the held-out points
    conditioned on the other points with CG bounds.

    A built-in solver only *preconditions* it (the wall between references and solvers,
    DEVELOPERS.md "Architecture": it changes iteration counts and SEs, never the expected
    answer): by default HODLR at tol 1e-10, or Vecchia with its neighbour count chosen by
    a pilot on all points and reused for the training points
    (``harness.audit.operator_preconditioner``). The preconditioner, its pilot and the
    iteration counts of the real runs are reported in ``info`` and ``by_metric``.
    Certified when every CG and Lanczos run converged and the CG bounds are rigorous
    (a nugget gives lambda_min >= nugget). With a Dask ``client`` the exact products run
    on its workers, with the same values (a fixed summation order).
    """

    def __init__(self, data: AuditData, *, base_seed: int, probes: int = 64,
                 preconditioner: PreconditionerSpec | None = None, leaf_size: int = 128,
                 memory_budget: int | None = None, client: object | None = None) -> None:
        from harness.references.operator import operator_evaluate, operator_kriging
        from harness.references.operator.products import KernelOperator

        self.probes = int(probes)
        spec = PreconditionerSpec() if preconditioner is None else preconditioner
        x, kernel, train = data.points, data.kernel, data.train
        rng = np.random.default_rng(solver_seed(base_seed, 0))
        t0 = time.perf_counter()
        built = build_operator_preconditioner(x, kernel, spec, rng=rng, leaf_size=leaf_size)
        ev = operator_evaluate(x, data.y, kernel, mean=data.mean,
                               preconditioner=built.factorization, rng=base_seed, score=True,
                               memory_budget=memory_budget, client=client, progress=False)
        seconds = time.perf_counter() - t0
        # released before the training points' one is built: the two are never held at
        # once (at 65,536 points HODLR at tol 1e-10 takes gigabytes)
        spec_t = PreconditionerSpec(family=built.family, knob=built.knob_value)
        built_record, built_description = built.to_dict(), built.describe()
        del built
        release_freed_memory()
        built_t = build_operator_preconditioner(x[train], kernel, spec_t, rng=rng,
                                                leaf_size=leaf_size)
        kr = operator_kriging(x[train], data.y[train], kernel, x[data.holdout],
                              mean=data.mean, preconditioner=built_t.factorization,
                              variance_at=data.variance_positions,
                              memory_budget=memory_budget, client=client, progress=False)
        certified = bool(ev.converged and kr.converged and kr.rigorous
                         and ev.bound_kind.startswith("residual/nugget"))
        self.messages = tuple(dict.fromkeys((*ev.messages, *kr.messages)))
        self.preconditioner = _preconditioner_record(
            built_record, built_description, training_seconds=built_t.seconds,
            loglik_iterations=ev.iterations, kriging_iterations=kr.iterations)
        del built_t
        release_freed_memory()   # the heap pages of both factorizations, for the audits
        uncertainty = {
            "loglik": dict(ev.uncertainty), "loglik_se": ev.loglik_se,
            "loglik_bound": ev.loglik_bound,
            "score_se": None if ev.score_se is None else [float(v) for v in ev.score_se],
            "score_bound": None if ev.score_bound is None
            else [float(v) for v in ev.score_bound],
            "score_note": "score_se (probes, estimate) enters the verdicts as score_se + "
                          "score_bound / 2 (the CG bounds and the dots' rounding, bounds)",
            "score_preconditioner_traces": ev.preconditioner_traces}
        self.info: ReferenceInfo = OperatorReferenceInfo(
            "operator", certified,
            f"exact operator: loglik SE {ev.loglik_se:.2g} nat, bound {ev.loglik_bound:.2g} "
            f"nat (quadratic-form bound {ev.quadratic_bound:.2g}, {ev.bound_kind}), "
            f"{ev.probes} probes, "
            f"{ev.products:,} exact products, {ev.iterations:,} iterations (kriging "
            f"{kr.iterations:,}); preconditioner: {self.preconditioner['description']}"
            + ("" if certified else "; NOT certified: " + "; ".join(self.messages)),
            preconditioner=self.preconditioner, uncertainty=uncertainty)
        entry = self.info.to_dict()
        self.by_metric: dict[str, dict[str, object]] = {
            "loglik": dict(entry), "score": dict(entry),
            "kriging": entry | _kriging_counts(data)}
        score_se = (np.zeros(kernel.n_params) if ev.score_se is None
                    else np.asarray(ev.score_se, dtype=float))
        if ev.score_bound is not None:
            score_se = score_se + 0.5 * np.asarray(ev.score_bound, dtype=float)
        control = _operator_trace_control(ev)
        self.by_metric["score"]["shared_probes"] = (
            "no shared-probe control: the solver's traces are estimated on their own"
            if control is None else
            f"shared-probe control: {control.source}, {control.probes.shape[1]} probes")
        self._values = ReferenceValues(
            loglik=ReferenceValue(ev.loglik, se=float(ev.loglik_se),
                                  bound=float(ev.loglik_bound)),
            score=np.asarray(ev.score, dtype=float), score_se=score_se,
            score_probes=int(ev.probes), trace_control=control,
            score_se_shared=(None if ev.shared_probes is None
                             else np.asarray(ev.shared_probes.other_score_bound) / 2.0),
            krige_mean=np.asarray(kr.mean), krige_mean_bound=np.asarray(kr.mean_bound),
            krige_var=np.asarray(kr.variance), loglik_seconds=seconds,
            logdet=ReferenceValue(float(ev.logdet), se=float(ev.logdet_se)),
            products=KernelOperator(x, kernel, memory_budget=memory_budget,
                                    progress=False).matvec)
        self.kriging = KrigingSide("operator", np.asarray(kr.mean), np.asarray(kr.variance),
                                   data.variance_positions)

    def values(self) -> ReferenceValues:
        return self._values


def _operator_trace_control(ev: OperatorEvaluation) -> TraceControl | None:
    """The operator's own score probes as the shared-probe control
    (``harness.audit.shared_probes``): its ML traces, estimated on these probes, with
    the exact per-probe values z_j' Sigma^-1 Sigma_i z_j and their CG bound."""
    shared = ev.shared_probes
    if shared is None or ev.reml or shared.columns.shape[1] < 2:
        return None
    return TraceControl(
        probes=shared.columns, exact=np.asarray(shared.trace_terms, dtype=float),
        per_probe=shared.per_probe, bound=np.asarray(shared.bound, dtype=float),
        source="the exact operator's score probes (CG with exact products)",
        estimated_on_probes=True)


@dataclass(frozen=True)
class OperatorReferenceInfo(ReferenceInfo):
    """``ReferenceInfo`` of the operator reference, with its preconditioner record (family,
    knob value, pilot table, iteration counts of the real runs) under ``preconditioner``
    and the terms of its stated uncertainty under ``uncertainty``."""

    preconditioner: Mapping[str, object] = field(default_factory=dict)
    #: Each term of the stated uncertainty, its kind (estimate or bound) and source
    #: (``OperatorEvaluation.uncertainty``), with the combined loglik SE and bound.
    uncertainty: Mapping[str, object] = field(default_factory=dict)

    def to_dict(self) -> dict[str, object]:
        return super().to_dict() | {"preconditioner": dict(self.preconditioner),
                                    "uncertainty": dict(self.uncertainty)}


def _preconditioner_record(built: dict[str, object], description: str, *,
                           training_seconds: float, loglik_iterations: int,
                           kriging_iterations: int) -> dict[str, object]:
    """The JSON record of the operator reference's preconditioner: that of all points
    (``built``, its ``BuiltPreconditioner.to_dict``: family, knob value, fallback, pilot
    table, seconds with the pilot, and ``description``, its ``describe``), the seconds of
    the training points' one (same family and knob value, no pilot) and the real runs'
    iteration counts (CG plus Lanczos steps for the log-likelihood and score, CG for
    kriging) beside the pilot's prediction."""
    return built | {"seconds_training_points": training_seconds,
                    "iterations_loglik_score": int(loglik_iterations),
                    "iterations_kriging": int(kriging_iterations),
                    "description": description}


class StructuredReference:
    """An exact structured reference as values: the state-space (Kalman) likelihood and
    score for 1D points and a half-integer Matern kernel, or the Kronecker ones for a
    tensor grid and a separable kernel. Exact (standard errors 0) and certified. The
    state-space kind also kriges the held-out points exactly, by the Rauch-Tung-Striebel
    smoother over all points with the held-out ones as missing observations
    (``harness.references.statespace_kriging``); the Kronecker kind offers no kriging at
    held-out data points (the kriging metric is then not measured).
    """

    def __init__(self, kind: str, data: AuditData, *, probes: int = 64) -> None:
        self.probes = int(probes)
        t0 = time.perf_counter()
        if kind == "statespace":
            from harness.references.statespace import StateSpaceReference

            ev = StateSpaceReference(data.points, data.kernel).evaluate(
                data.y, mean=data.mean, score=True)
            what = "Kalman filter (exact)"
            seconds = time.perf_counter() - t0
            kriging = _smoother_values(data)
            control, control_note = line_trace_control(data.points, data.kernel, data.probes)
        elif kind == "kronecker":
            from harness.references.kronecker import KroneckerReference

            ev = KroneckerReference(data.points, data.kernel).evaluate(  # type: ignore[arg-type]
                data.y, mean=data.mean, score=True)
            what = "Kronecker eigen-decomposition (exact)"
            seconds = time.perf_counter() - t0
            kriging = None
            control, control_note = None, ("no shared-probe control: the solver's traces "
                                           "are estimated on their own")
        else:
            raise ValueError(f"{kind!r} is no structured reference kind")
        krige_what = ("; kriging by the Rauch-Tung-Striebel smoother (exact)"
                      if kriging is not None else "; no kriging at held-out points")
        self.info = ReferenceInfo(kind, True, what + krige_what)
        krige_mean, krige_var = (None, None) if kriging is None else kriging
        self._values = ReferenceValues(
            loglik=ReferenceValue(float(ev.loglik)), score=np.asarray(ev.score, dtype=float),
            score_se=np.zeros(data.kernel.n_params), krige_mean=krige_mean,
            krige_mean_bound=None if krige_mean is None else np.zeros_like(krige_mean),
            krige_var=krige_var, loglik_seconds=seconds, loglik_source=f"the {what}",
            trace_control=control)
        entry = {"kind": kind, "certified": True, "exact": True, "description": what}
        self.by_metric: dict[str, dict[str, object]] = {
            "loglik": dict(entry), "score": entry | {"shared_probes": control_note},
            "kriging": (entry | {"description": "Rauch-Tung-Striebel smoother (exact)",
                                 **_kriging_counts(data)}
                        if kriging is not None else
                        {"kind": None, "certified": False, "exact": False,
                         "description": f"the {kind} reference offers no kriging at "
                                        "held-out points: not measured"})}

    def values(self) -> ReferenceValues:
        return self._values


def _smoother_values(data: AuditData) -> tuple[np.ndarray, np.ndarray]:
    """The state-space reference's kriging: means at every held-out point, variances at
    the variance points, conditioned on the other points."""
    from harness.references.statespace_kriging import smoother_kriging

    train = data.train
    kr = smoother_kriging(data.points[train], data.y[train], data.kernel,
                          data.points[data.holdout], mean=data.mean)
    return np.asarray(kr.mean), np.asarray(kr.variance)[data.variance_positions]


def _kriging_counts(data: AuditData) -> dict[str, object]:
    return {"n_holdout": int(np.asarray(data.holdout).size),
            "n_variance_points": int(data.variance_positions.size)}


#: The metric groups ``reference_by_metric`` reports.
METRIC_GROUPS: tuple[str, ...] = ("loglik", "score", "kriging")


def metric_kinds(kind: str) -> dict[str, str | None]:
    """The reference kind that will serve each metric group (``METRIC_GROUPS``) once a
    reference of ``kind`` is built, as ``reference_by_metric`` then reports it: ``kind``
    for all three, except kriging against the Kronecker reference, which offers none at
    held-out points (None: not measured; ``StructuredReference``). For a plan made
    before any reference is built."""
    return {group: None if (group == "kriging" and kind == "kronecker") else kind
            for group in METRIC_GROUPS}


def reference_by_metric(reference: PairedReference | ValueReference, data: AuditData
                        ) -> dict[str, dict[str, object]]:
    """Which reference served which metric group (``METRIC_GROUPS``), each with its
    detail (``ReferenceInfo.to_dict``) and, for kriging, the counts used: one reference
    for all three, except where the reference says otherwise (``by_metric``: the
    state-space and Kronecker references)."""
    own = getattr(reference, "by_metric", None)
    if own is not None:
        return {name: dict(entry) for name, entry in own.items()}
    entry = reference.info.to_dict()
    return {"loglik": dict(entry), "score": dict(entry),
            "kriging": entry | _kriging_counts(data)}


def build_reference(kind: str, data: AuditData, *, solver: ResolvedSolver,
                    solver_options: Mapping[str, object], base_seed: int,
                    memory_budget: int | None, ladder_factor: float, probes: int,
                    leaf_size: int = 128, isolate: bool = True,
                    preconditioner: PreconditionerSpec | None = None,
                    client: object | None = None) -> PairedReference | ValueReference:
    """The engine's reference of ``kind`` (``harness.audit.reference_choice``) on ``data``.

    ``preconditioner`` is the operator reference's (None: ``PreconditionerSpec()``, HODLR).

    ``isolate`` runs the dense reference's factorizations in a child process (``check``;
    a ``run`` task's worker is already one). ``probes`` sets the operator's and the
    structured references' Hutch++ probes of the solver's score (at least 64).
    ``client``: a Dask client for the operator's exact products (None: this process).
    """
    if kind == "dense":
        return DenseReference(data, memory_budget=memory_budget, isolate=isolate)
    if kind in ("statespace", "kronecker"):
        return StructuredReference(kind, data, probes=max(64, probes))
    if kind == "operator":
        return OperatorReference(data, base_seed=base_seed, probes=max(64, probes),
                                 preconditioner=preconditioner, leaf_size=leaf_size,
                                 memory_budget=memory_budget, client=client)
    if kind == "ladder":
        return LadderReference(data, solver, factor=ladder_factor, base_seed=base_seed,
                               options=solver_options)
    raise ValueError(f"reference kind {kind!r}: no engine reference")
