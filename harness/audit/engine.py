"""The audit engine: every tolerance of a solver on one dataset, over the solver's seeds,
against one reference, judged and recommended by the rule of ``harness.audit.rule``.

``check`` and every ``run`` task go through the rule's functions (``judge_metric``,
``tolerance_verdict``, ``recommend``), so they give the same verdict on the same numbers.
The rule, its statuses and its limits live in ``harness.audit.rule`` (DEVELOPERS.md, "The
verdict rule"); this module measures and pairs.
"""

from __future__ import annotations

import math
import statistics
import time
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, replace
from typing import TYPE_CHECKING, Protocol, runtime_checkable

import numpy as np

from harness.audit.metric_names import canonical_name
from harness.audit.metric_values import MetricValue
from harness.audit.rule import (
    SOLVER_FAILED,
    LadderRecommendation,
    MetricJudgement,
    ReferenceInfo,
    Thresholds,
    ToleranceVerdict,
    judge_metric,
    number_or_none,
    recommend,
    tolerance_verdict,
    worst,
)
from harness.audit.solver_calls import SolverCall, SolverIsolation, call_solver, is_breakdown
from harness.audit.solver_seeds import seeded_options
from harness.infra.option_specs import LADDER_FACTOR as LADDER_FACTOR_SPEC
from harness.likelihood.trace.control import TraceControl
from harness.model.kernels import Kernel

if TYPE_CHECKING:
    from harness.audit.shared_probes import ScoreError
    from harness.audit.sides import KrigingSide, Side
    from harness.audit.task_metrics import DetailRequest
    from harness.solvers.registry import ResolvedSolver

#: The ladder reference is the solver at tol / LADDER_FACTOR unless set otherwise (the
#: default of ``check --ladder-factor`` and of a case file's ``[reference] ladder_factor``).
LADDER_FACTOR: float = float(LADDER_FACTOR_SPEC.default)


@dataclass(frozen=True)
class ReferenceValue:
    """A reference quantity with its uncertainty.

    ``se`` is a standard error (0 for an exact reference), ``bound`` a deterministic
    bound on its error (0 when exact).
    """

    value: float
    se: float = 0.0
    bound: float = 0.0


# -- the audit of a ladder of tolerances on one dataset ----------------------------------
@dataclass(frozen=True)
class AuditData:
    """One dataset at the parameters under audit.

    ``holdout`` indexes the kriging points; kriging conditions on the other points, every
    other metric uses all n points. Means are predicted at every held-out point, variances
    at ``variance_at`` (positions among the held-out points; None: every one,
    ``harness.audit.audit_sampling.variance_positions`` draws the subset). ``fisher``
    (the unit of the parameter shifts) is None when no Fisher information is at hand (a
    grid task on the exact operator): the shift is then not measured and the verdict
    says so.
    """

    points: np.ndarray
    y: np.ndarray
    kernel: Kernel
    mean: str
    holdout: np.ndarray
    fisher: np.ndarray | None
    probes: np.ndarray
    variance_at: np.ndarray | None = None
    #: Also estimate the KL divergence against a value reference (the exact operator),
    #: with ``kl_probes`` Hutchinson probes of exact products (opt-in: it costs exact
    #: products for every knob value and seed). A dense reference measures it exactly
    #: whatever this says.
    kl: bool = False
    kl_probes: int = 32

    @property
    def variance_positions(self) -> np.ndarray:
        """Positions among the held-out points that get a kriging variance."""
        if self.variance_at is None:
            return np.arange(np.asarray(self.holdout).size)
        return np.asarray(self.variance_at, dtype=np.intp)

    @property
    def train(self) -> np.ndarray:
        mask = np.ones(self.y.size, dtype=bool)
        mask[self.holdout] = False
        return np.flatnonzero(mask)


@dataclass(frozen=True)
class ReferenceSides:
    """A paired reference's quantities at one tolerance (dense: the same at every one).

    ``full`` is of all n points, ``kriging`` of the points other than the held-out ones,
    ``train_matvec`` the reference's Sigma product on those points (efficiency criteria),
    ``loglik_se`` the reference log-likelihood's own standard error (0 when exact);
    ``exact`` whether ``full`` is of the exact Sigma (dense), so that the KL divergence
    of each solver's Sigma~ from it is measured (``harness.audit.metrics.kl_divergence``).
    """

    full: Side
    kriging: KrigingSide
    train_matvec: Callable[[np.ndarray], np.ndarray]
    loglik_seconds: float
    loglik_se: float = 0.0
    exact: bool = False


class PairedReference(Protocol):
    """A reference that gives ``ReferenceSides`` (dense Cholesky, tolerance ladder)."""

    info: ReferenceInfo

    def sides(self, tol: float) -> ReferenceSides: ...


@dataclass(frozen=True)
class ReferenceValues:
    """A value reference's numbers (the exact operator, the structured references), each
    with its uncertainty.

    ``loglik`` carries its SE and deterministic bound; ``score_se`` the score's SE;
    ``krige_mean_bound`` a bound on each kriging mean's error; the kriging is of the
    held-out points conditioned on the other points (None when the reference offers no
    kriging: the kriging metric is then not measured); ``krige_var`` holds the variances
    at ``AuditData.variance_positions`` only.
    """

    loglik: ReferenceValue
    score: np.ndarray
    score_se: np.ndarray
    krige_mean: np.ndarray | None
    krige_mean_bound: np.ndarray | None
    krige_var: np.ndarray | None
    loglik_seconds: float
    #: log det Sigma with its SE, and exact products B -> Sigma B (picklable), for the KL
    #: estimate beyond the dense limit (``AuditData.kl``); None where the reference has
    #: neither.
    logdet: ReferenceValue | None = None
    products: Callable[[np.ndarray], np.ndarray] | None = None
    #: What the log-likelihood was measured against, for the metric's note.
    loglik_source: str = "the exact operator (its SE and CG bound)"
    #: The exact side of shared probes for the solver's score traces
    #: (``harness.audit.shared_probes``); None: the solver's traces are estimated on
    #: their own.
    trace_control: TraceControl | None = None
    #: The score's uncertainty that remains when the solver shares ``trace_control``'s
    #: probes (the part not from the trace probes); None: zeros.
    score_se_shared: np.ndarray | None = None
    #: The probes behind ``score_se`` (0: the score is exact, or their count unknown).
    score_probes: int = 0


class ValueReference(Protocol):
    """A reference that gives ``ReferenceValues`` (no factorization to pair with)."""

    info: ReferenceInfo
    probes: int

    def values(self) -> ReferenceValues: ...


@runtime_checkable
class HasValues(Protocol):
    def values(self) -> ReferenceValues: ...


@dataclass(frozen=True)
class SeedAudit:
    """One tolerance on one seed of the solver: metric values and judgements."""

    index: int
    seed: int
    loglik: float
    metrics: tuple[MetricValue, ...]
    judgements: tuple[MetricJudgement, ...]
    seconds: float
    nbytes: int
    notes: tuple[str, ...] = ()
    error: str = ""

    def to_dict(self) -> dict[str, object]:
        return {"index": self.index, "seed": self.seed, "loglik": number_or_none(self.loglik),
                "metrics": {m.name: number_or_none(m.value) for m in self.metrics},
                "uncertainty": {m.name: number_or_none(m.uncertainty or 0.0) for m in self.metrics
                                if m.threshold is not None},
                "status": {j.metric: j.status for j in self.judgements},
                "seconds": number_or_none(self.seconds), "nbytes": self.nbytes,
                "notes": list(self.notes), "error": self.error or None}


class SavedAudits(Protocol):
    """Where ``audit_tolerances(saved=...)`` finds and keeps finished (knob value, seed)
    audits, so a caller that keeps them on disk (``check``'s state folder,
    ``harness.check.check_state``) resumes after an interruption, losing at most the audit
    in flight. The engine never knows how or where they are kept."""

    def load(self, value: float, index: int, seed: int) -> SeedAudit | None:
        """The saved audit of ``seed`` (the ``index``-th) at knob ``value``, or None."""
        ...

    def save(self, value: float, index: int, seed: int, audit: SeedAudit) -> None:
        """Keep a finished audit (atomically: an interruption leaves it whole or absent)."""
        ...


@dataclass(frozen=True)
class ToleranceAudit:
    """A tolerance's verdict with every seed's audit and the timing summary."""

    verdict: ToleranceVerdict
    seeds: tuple[SeedAudit, ...]
    seconds: float                  # median over seeds of one log-likelihood
    speedup: float | None           # reference log-likelihood time / ``seconds``
    nbytes: int
    #: The solver's accuracy knob (``harness.solvers.knobs``); ``verdict.tol`` holds its
    #: value whatever its name.
    knob_name: str = "tol"

    @property
    def tol(self) -> float | None:
        """The tolerance for a ``tol`` solver, None for a solver with another knob."""
        return self.verdict.tol if self.knob_name == "tol" else None

    def to_dict(self, reference: str) -> dict[str, object]:
        """The JSON form of a tolerance in ``check --json`` and in a grid task's record:
        status, reasons, every seed, the spread, and each deciding metric under its own
        name and its canonical one (``harness.audit.metric_names``). ``tol`` is None for
        a solver whose knob is not ``tol``; ``knob_name`` and ``knob_value`` always say
        what was audited."""
        v = self.verdict
        out: dict[str, object] = {
            "tol": self.tol, "knob_name": self.knob_name, "knob_value": v.tol,
            "safe": v.safe, "reference": reference,
            "seconds": number_or_none(self.seconds),
            "speedup": None if self.speedup is None else number_or_none(self.speedup),
            "nbytes": self.nbytes, "error": "; ".join(v.failures) or None,
            "status": v.status, "reasons": list(v.reasons),
            "seeds": [s.to_dict() for s in self.seeds],
            "spread": {k: s.to_dict() for k, s in v.spread.items()}}
        for m in self.worst_metrics():
            out[m.name] = m.to_dict()
            out.setdefault(canonical_name(m.name), out[m.name])
        return out

    def worst_metrics(self) -> tuple[MetricValue, ...]:
        """Per metric, the value of the seed that decides (limited) or the largest."""
        by_name: dict[str, list[tuple[SeedAudit, MetricValue]]] = {}
        for audit in self.seeds:
            for m in audit.metrics:
                by_name.setdefault(m.name, []).append((audit, m))
        out: list[MetricValue] = []
        for name, pairs in by_name.items():
            if pairs[0][1].threshold is not None:
                judged = [(next(j for j in a.judgements if j.metric == name), m)
                          for a, m in pairs]
                decider = worst([j for j, _ in judged])
                out.append(next(m for j, m in judged if j is decider))
            else:
                out.append(max((m for _, m in pairs),
                               key=lambda m: abs(m.value) if math.isfinite(m.value)
                               else math.inf))
        return tuple(out)


@dataclass(frozen=True)
class EngineResult:
    """Every tolerance's audit and the recommendation."""

    reference: ReferenceInfo
    tolerances: tuple[ToleranceAudit, ...]
    recommendation: LadderRecommendation
    seeds: tuple[int, ...]
    solver: str
    #: A grid task's detailed metric groups (``harness.audit.task_metrics``), else None.
    detail: dict[str, object] | None = None


def _judge(metrics: Sequence[MetricValue]) -> tuple[MetricJudgement, ...]:
    return tuple(judge_metric(m.name, m.value, m.threshold, se=m.uncertainty or 0.0)
                 for m in metrics if m.threshold is not None)


def _seed_audit(index: int, seed: int, tol: float, data: AuditData, solver: ResolvedSolver,
                options: Mapping[str, object], ref: ReferenceSides,
                thresholds: Thresholds) -> SeedAudit:
    from harness.audit.metrics.kl_divergence import KL_NAT, kl_divergence_from_kernel
    from harness.audit.sides import evaluate_side, kriging_side, predictor_mse
    from harness.audit.tolerance_metrics import kriging_metrics, likelihood_metrics

    opts = seeded_options(solver.factory, options, seed) | solver.knob.arguments(tol)
    kernel, x = data.kernel, data.points
    train = data.train
    t0 = time.perf_counter()
    fac = solver.factorize(x, kernel, kernel.theta, **opts)
    side = evaluate_side(f"{solver.name} {tol:g}", fac, x, data.y, kernel, mean=data.mean,
                         probes=data.probes, factor_seconds=time.perf_counter() - t0)
    notes = tuple(getattr(fac, "notes", ()))
    nbytes = int(fac.nbytes)
    kl = (kl_divergence_from_kernel(fac, kernel, x, logdet_exact=ref.full.logdet)
          if ref.exact else None)
    del fac
    metrics = likelihood_metrics(side, ref.full, kernel=kernel, fisher=data.fisher,
                                 probes=data.probes, thresholds=thresholds,
                                 reference_loglik_se=ref.loglik_se)
    if kl is not None:
        metrics.append(MetricValue(
            KL_NAT, kl.value,
            note="nats; KL(N(0, Sigma) || N(0, Sigma~)) of the whole distribution, exact "
                 "(Sigma's columns from the kernel, log det Sigma from the dense reference)"))
    fac_t = solver.factorize(x[train], kernel, kernel.theta, **opts)
    held = x[data.holdout]
    ks = kriging_side(f"{solver.name} {tol:g}", fac_t, x[train], data.y[train], kernel,
                      held, mean=data.mean, variance_at=data.variance_positions)
    e_at = predictor_mse(fac_t, x[train], kernel, held[data.variance_positions],
                         mean=data.mean, matvec=ref.train_matvec)
    del fac_t
    metrics += kriging_metrics(ks, ref.kriging, predictor_mse=e_at, thresholds=thresholds)
    return SeedAudit(index=index, seed=seed, loglik=side.loglik, metrics=tuple(metrics),
                     judgements=_judge(metrics), seconds=side.loglik_seconds, nbytes=nbytes,
                     notes=notes)


def _value_seed_audit(index: int, seed: int, tol: float, data: AuditData,
                      solver: ResolvedSolver, options: Mapping[str, object],
                      ref: ReferenceValues, probes: int,
                      thresholds: Thresholds) -> SeedAudit:
    """One seed against a value reference: the solver's own likelihood, its score error
    (by its own Hutch++ traces, or first on the reference's shared probes where it offers
    them: ``_shared_score_error``) and kriging conditioned on the other points. A
    deterministic bound b enters a metric's uncertainty as b / 2, so that the rule's
    2 x uncertainty covers it."""
    from harness.audit.metrics.held_out_scale import held_out_scale
    from harness.audit.shared_probes import own_score_error
    from harness.audit.sides import kriging_side
    from harness.audit.tolerance_metrics import shift_metrics
    from harness.likelihood import evaluate_likelihood

    opts = seeded_options(solver.factory, options, seed) | solver.knob.arguments(tol)
    kernel, x, train = data.kernel, data.points, data.train
    control = ref.trace_control
    t0 = time.perf_counter()
    fac = solver.factorize(x, kernel, kernel.theta, **opts)
    ev = evaluate_likelihood(fac, x, data.y, kernel, mean=data.mean, score=control is None,
                             trace="hutchpp", probes=probes, rng=seed, fisher=False)
    seconds = time.perf_counter() - t0
    score = (own_score_error(np.asarray(ev.score), ev.trace_stderr, ref.score, ref.score_se)
             if control is None else
             _shared_score_error(fac, ev.beta, data, ref, control, probes=probes, seed=seed,
                                 thresholds=thresholds))
    notes = tuple(getattr(fac, "notes", ()))
    nbytes = int(fac.nbytes)
    kl = _estimated_kl(fac, ref, data, seed) if data.kl else None
    if data.kl and kl is None:
        notes += ("KL divergence not measured: this reference gives no exact products and "
                  "log det Sigma",)
    del fac
    metrics = [MetricValue("loglik_error", ev.loglik - ref.loglik.value,
                           thresholds.loglik_nats,
                           uncertainty=ref.loglik.se + ref.loglik.bound / 2.0,
                           note=f"nats; against {ref.loglik_source}")]
    shift = shift_metrics(score.error, score.stderr, kernel=kernel, fisher=data.fisher,
                          thresholds=thresholds)
    metrics.extend(replace(m, note=f"{m.note}; {score.note}") if m.name == "param_shift_se"
                   else m for m in shift)
    if kl is not None:
        metrics.append(kl)
    if ref.krige_mean is not None and ref.krige_var is not None:
        fac_t = solver.factorize(x[train], kernel, kernel.theta, **opts)
        ks = kriging_side(f"{solver.name} {tol:g}", fac_t, x[train], data.y[train], kernel,
                          x[data.holdout], mean=data.mean, variance_at=data.variance_positions)
        del fac_t
        bound = (np.zeros_like(ref.krige_mean) if ref.krige_mean_bound is None
                 else ref.krige_mean_bound)
        scale = held_out_scale(ref.krige_mean.size, ref.krige_var, data.variance_positions)
        z = scale.errors(ks.mean, ref.krige_mean)
        worst_i = int(np.argmax(z + bound / scale.sd))
        metrics.append(MetricValue(
            "kriging_mean_sd", float(z[worst_i]), thresholds.kriging_mean_sd,
            uncertainty=float(bound[worst_i] / scale.sd[worst_i]) / 2.0,
            note=f"largest |m~ - m| / sqrt(v) at {z.size} held-out points, conditioned on "
                 f"the other points ({int(scale.own.sum())} with their own variance, the "
                 "others scaled by the smallest; the reference's bound)"))
        positive = ref.krige_var > 0
        ratio = ks.variance[positive] / ref.krige_var[positive]
        if ratio.size:
            metrics.append(MetricValue(
                "kriging_var_ratio", float(np.max(np.abs(ratio - 1.0))),
                note=f"largest |v~/v - 1| at {ratio.size} variance points; v~/v in "
                     f"[{ratio.min():.6g}, {ratio.max():.6g}]"))
    return SeedAudit(index=index, seed=seed, loglik=ev.loglik, metrics=tuple(metrics),
                     judgements=_judge(metrics), seconds=seconds, nbytes=nbytes, notes=notes)


def _shared_score_error(fac: object, beta: np.ndarray, data: AuditData,
                        ref: ReferenceValues, control: TraceControl, *, probes: int,
                        seed: int, thresholds: Thresholds) -> ScoreError:
    """The solver's score error on the reference's shared probes
    (``harness.audit.shared_probes``), merged with its own Hutch++ estimate only when the
    shared one's shift SE is above ``SHARP_ENOUGH`` of the limit."""
    from harness.audit.shared_probes import (
        SHARP_ENOUGH,
        merge,
        own_score_error,
        shared_score_error,
        solver_quadratics,
    )
    from harness.audit.tolerance_metrics import shift_uncertainty
    from harness.likelihood.traces import trace_terms
    from harness.solvers.fallback import adapt

    kernel, x = data.kernel, data.points
    adapted = adapt(fac, x, kernel)
    quadratics = solver_quadratics(adapted, x, data.y, kernel, mean=data.mean, beta=beta)
    shared = shared_score_error(adapted, quadratics, ref.score, control, ref.score_se_shared)
    if data.fisher is None or np.all(shift_uncertainty(shared.stderr, data.fisher)
                                     <= SHARP_ENOUGH * thresholds.param_shift_se):
        return shared
    # the solver's own Hutch++ traces, as evaluate_likelihood takes them (same probes)
    own = trace_terms(adapted, kernel.n_params, method="hutchpp", probes=probes, rng=seed)
    return merge(shared, own_score_error(0.5 * quadratics - 0.5 * own.traces, own.stderr,
                                         ref.score, ref.score_se), control)


def _estimated_kl(fac: object, ref: ReferenceValues, data: AuditData, seed: int
                  ) -> MetricValue | None:
    """KL(N(0, Sigma) || N(0, Sigma~)) by Hutchinson's estimator with the reference's
    exact products (``harness.audit.metrics.kl_divergence.kl_divergence_estimate``); its
    uncertainty combines the probes' SE with 1/2 the SE of the reference's log det Sigma
    (independent). None when the reference offers no products or log det."""
    from harness.audit.metrics.kl_divergence import KL_NAT, kl_divergence_estimate

    if ref.products is None or ref.logdet is None:
        return None
    kl = kl_divergence_estimate(fac, ref.products, logdet_exact=ref.logdet.value,
                                probes=data.kl_probes, rng=np.random.default_rng([seed, 7]))
    se = math.hypot(kl.stderr, 0.5 * ref.logdet.se)
    return MetricValue(KL_NAT, kl.value, uncertainty=se,
                       note=f"nats; KL(N(0, Sigma) || N(0, Sigma~)) estimated with "
                            f"{kl.probes} Hutchinson probes of exact products and the "
                            f"reference's log det Sigma (SE {se:.2g}, information)")


#: Limited metrics every seed must measure (a missing one makes the verdict unresolved).
REQUIRED_METRICS: tuple[str, ...] = ("loglik_error", "param_shift_se", "kriging_mean_sd")


def audit_tolerances(data: AuditData, solver: ResolvedSolver, tolerances: Sequence[float],
                     reference: PairedReference | ValueReference, *, seeds: Sequence[int],
                     solver_options: Mapping[str, object] | None = None,
                     thresholds: Thresholds | None = None, fit_converged: bool = True,
                     progress: Callable[[str], None] | None = None,
                     detail: DetailRequest | None = None,
                     isolation: SolverIsolation | None = None,
                     saved: SavedAudits | None = None) -> EngineResult:
    """Audit ``tolerances`` of ``solver`` on ``data`` against ``reference`` over ``seeds``
    of the solver's randomness (``harness.audit.solver_seeds``), and recommend one.

    The one entry of the audit: ``check`` calls it with a user's data at the fitted (or
    fixed) parameters, every ``run`` task with its generated (or file) data at the task's
    parameters and its one tolerance. Each tolerance gets a ``ToleranceVerdict`` (module
    docstring: worst seed decides, ladder at best unresolved, unconverged fit stated); the
    recommendation follows ``recommend``. ``detail`` (a grid task) adds the task's
    detailed metric groups (``harness.audit.task_metrics``) to the result.

    With ``isolation`` (``check``) each (tolerance, seed) audit runs whole in a child
    process (``harness.audit.solver_calls``); a crash, an exit without a result, a
    timeout or an exception of the solver gives the tolerance the status "solver failed"
    with a one-line reason, its later seeds are not run, and the other tolerances go on.
    Without it (a built-in solver, or a ``run`` task, whose worker process is that
    boundary) the solver runs here and its errors are classified the same way: a
    numerical breakdown makes the tolerance unsafe, any other error is a failed solver.
    With ``saved`` (``SavedAudits``) an audit found there is reused, not rerun, and each
    audit that finishes is handed to it as soon as it does.
    """
    from harness.solvers.fallback import SolverOutputError, SolverProtocolError
    from harness.solvers.registry import SolverRuntimeError

    th = thresholds or Thresholds()
    say = progress or (lambda _m: None)
    if not seeds:
        raise ValueError("audit_tolerances: at least one solver seed is needed")
    knob = solver.knob
    audits: list[ToleranceAudit] = []
    for tol in knob.sorted_loose_to_tight(tolerances):
        at = f"tol {tol:g}" if knob.is_tol else knob.value_text(tol)
        rows: list[SeedAudit] = []
        failures: list[str] = []
        ref: ReferenceSides | ReferenceValues | None
        try:
            ref = (reference.values() if isinstance(reference, HasValues)
                   else reference.sides(tol))
        except (SolverRuntimeError, SolverOutputError, np.linalg.LinAlgError) as exc:
            failures.append(f"the {reference.info.kind} reference failed at {at}: {exc}")
            ref = None
        say(f"tolerance {tol:g} ({len(seeds)} solver seed(s))" if knob.is_tol
            else f"knob value {at} ({len(seeds)} solver seed(s))")
        solver_failed = ""
        for index, seed in enumerate(seeds if ref is not None else ()):
            reused = None if saved is None else saved.load(tol, index, seed)
            if reused is not None:
                rows.append(reused)
                continue
            say(f"solver seed {index + 1}/{len(seeds)} at {at}")
            audit_seed, arguments = (
                (_value_seed_audit, (index, seed, tol, data, solver, solver_options or {},
                                     ref, getattr(reference, "probes", 64), th))
                if isinstance(ref, ReferenceValues) else
                (_seed_audit, (index, seed, tol, data, solver, solver_options or {}, ref,
                               th)))
            if isolation is None:
                try:
                    call = SolverCall(value=audit_seed(*arguments))
                except (SolverRuntimeError, SolverOutputError, SolverProtocolError,
                        np.linalg.LinAlgError) as exc:
                    # classified as in a child (``solver_calls.guarded``): a numerical
                    # breakdown is unsafe at this knob value, anything else a failure
                    call = SolverCall(failure=f"seed {index} ({seed}): {exc}",
                                      breakdown=is_breakdown(exc))
            else:
                call = call_solver(audit_seed, *arguments, isolation=isolation,
                                   who=f"solver {solver.name!r}",
                                   where=f"at {at}, seed {index} (n = {data.y.size:,})")
            if not call.failure:
                rows.append(call.value)
                if saved is not None:
                    saved.save(tol, index, seed, call.value)
                continue
            failures.append(call.failure)
            if call.failed_solver:
                solver_failed = call.failure
                if index + 1 < len(seeds):
                    say(f"solver failed: {call.failure}; the later seeds at {at} are "
                        "not run")
                break
        info = {name: [m.value for r in rows for m in r.metrics if m.name == name]
                for name in {m.name for r in rows for m in r.metrics
                             if m.threshold is None}}
        verdict = tolerance_verdict(tol, [r.judgements for r in rows], reference=reference.info,
                                    failures=failures, required=REQUIRED_METRICS,
                                    fit_converged=fit_converged, info=info)
        if solver_failed:
            verdict = replace(verdict, status=SOLVER_FAILED)
        seconds = statistics.median([r.seconds for r in rows]) if rows else math.nan
        speedup = (ref.loglik_seconds / seconds if ref is not None and rows and seconds > 0
                   else None)
        audits.append(ToleranceAudit(verdict=verdict, seeds=tuple(rows), seconds=seconds,
                                     speedup=speedup,
                                     nbytes=max((r.nbytes for r in rows), default=0),
                                     knob_name=knob.name))
    rec = recommend({a.verdict.tol: a.verdict.status for a in audits},
                    more_accurate=knob.more_accurate, knob=knob.name)
    body = None
    if detail is not None:
        from harness.audit.task_metrics import group_metrics

        body = group_metrics(detail)
    return EngineResult(reference=reference.info, tolerances=tuple(audits),
                        recommendation=rec, seeds=tuple(seeds), solver=solver.name,
                        detail=body)
