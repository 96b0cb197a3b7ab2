"""The audit engine's rule: metric -> tolerance verdict -> recommendation.

Every verb that judges tolerances (``check``, every ``run`` task, the run-level verdicts of
``harness.audit.verdict``) goes through these functions, so they give the same verdict on
the same numbers.

Metric rule (DESIGN section 7). A metric's error e is measured with an uncertainty: a
standard error s (stochastic trace estimates, an operator reference's Monte Carlo
corrections; 0 for a dense reference) and a deterministic bound b (e.g. a CG residual
bound; 0 when exact). Against a limit c:

* ``safe``       when |e| + 2 s + b <= c;
* ``unsafe``     when |e| - 2 s - b >  c;
* ``unresolved`` otherwise, and whenever e or s is not a finite number (not measured).

The factor 2 is the usual two-sided ~95% normal interval (common practice).

Tolerance rule. A tolerance is ``safe`` when every limited metric is safe on every seed of
the solver's randomness (the worst seed decides), the solver finished on every seed, and
the reference is certified and exact (dense, structured or operator): a ladder reference
(the solver at a tighter tolerance) is extra evidence only, so a ladder-only verdict is at
best ``unresolved``. Any unsafe metric on any seed, or a solver failure, makes it
``unsafe``. A fit that did not converge does not change the status but every verdict says
it was measured at an unconverged estimate.

Recommendation rule: the loosest tolerance that is safe and has no unsafe or unresolved
tighter tolerance. A ladder whose statuses are not monotone (a looser tolerance safe above
a tighter one that is not) is reported as non-monotone.

Limits 0.1 nat, 0.1 SE and 0.05 predictive SD are common practice chosen for covaudit,
not a published standard (``harness.audit.verdict.Thresholds``).
"""

from __future__ import annotations

import math
import statistics
import time
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Protocol, runtime_checkable

import numpy as np

from harness.audit.metric_values import MetricValue
from harness.audit.solver_seeds import seeded_options
from harness.grid.tasks import ALL_REFERENCE_KINDS, AuditSettings
from harness.model.kernels import Kernel

if TYPE_CHECKING:
    from harness.audit.sides import KrigingSide, Side
    from harness.audit.verdict import Thresholds
    from harness.solvers.registry import ResolvedSolver

#: Verdict values, from best to worst severity order used by "the worst seed decides".
SAFE, UNRESOLVED, UNSAFE = "safe", "unresolved", "unsafe"
STATUSES: tuple[str, ...] = (SAFE, UNRESOLVED, UNSAFE)
_SEVERITY = {SAFE: 0, UNRESOLVED: 1, UNSAFE: 2}
#: Half-width of the uncertainty interval in standard errors (common practice).
SE_MULTIPLIER = 2.0
#: Reference kinds the engine accepts; ``ladder`` is never the sole basis of ``safe``.
EXACT_REFERENCES: frozenset[str] = frozenset({"dense", "statespace", "kronecker", "operator"})
REFERENCE_KINDS: tuple[str, ...] = ALL_REFERENCE_KINDS
#: The ladder reference is the solver at tol / LADDER_FACTOR unless set otherwise (the
#: case files' and tasks' default, ``AuditSettings.ladder_factor``).
LADDER_FACTOR: float = AuditSettings.ladder_factor
UNCONVERGED_REASON = "measured at an unconverged estimate (the fit did not converge)"
LADDER_REASON = ("ladder reference only (the solver at a tighter tolerance): extra "
                 "evidence, never the sole basis of safe")


@dataclass(frozen=True)
class ReferenceValue:
    """A reference quantity with its uncertainty.

    ``se`` is a standard error (0 for an exact reference), ``bound`` a deterministic
    bound on its error (0 when exact).
    """

    value: float
    se: float = 0.0
    bound: float = 0.0


@dataclass(frozen=True)
class ReferenceInfo:
    """What a verdict needs to know about the reference it was measured against."""

    kind: str
    certified: bool
    description: str = ""

    def __post_init__(self) -> None:
        if self.kind not in REFERENCE_KINDS:
            raise ValueError(f"reference kind {self.kind!r}: expected one of "
                             f"{', '.join(REFERENCE_KINDS)}")

    @property
    def exact(self) -> bool:
        return self.kind in EXACT_REFERENCES

    def to_dict(self) -> dict[str, object]:
        return {"kind": self.kind, "certified": self.certified, "exact": self.exact,
                "description": self.description}


@dataclass(frozen=True)
class MetricJudgement:
    """One limited metric on one seed: |error|, its uncertainty, the limit and status."""

    metric: str
    value: float
    se: float
    bound: float
    limit: float
    status: str
    reason: str

    @property
    def upper(self) -> float:
        """|e| + 2 s + b, the value that must stay within the limit for ``safe``."""
        return abs(self.value) + SE_MULTIPLIER * self.se + self.bound

    def to_dict(self) -> dict[str, object]:
        return {"metric": self.metric, "value": _num(self.value), "se": _num(self.se),
                "bound": _num(self.bound), "limit": self.limit, "status": self.status,
                "reason": self.reason}


def _num(value: float) -> float | None:
    return float(value) if isinstance(value, int | float) and math.isfinite(value) else None


def judge_metric(metric: str, error: float, limit: float, *, se: float = 0.0,
                 bound: float = 0.0) -> MetricJudgement:
    """The metric rule of the module docstring."""
    values = (error, se, bound)
    if not all(isinstance(v, int | float) and math.isfinite(v) for v in values):
        return MetricJudgement(metric, float(error), float(se), float(bound), limit,
                               UNRESOLVED, f"{metric}: not measured (value {error!r}, "
                                           f"SE {se!r})")
    e, s, b = abs(float(error)), float(se), float(bound)
    band = f"{e:.3g} +- {SE_MULTIPLIER:g}x{s:.2g}" + (f" + {b:.2g}" if b else "")
    if e + SE_MULTIPLIER * s + b <= limit:
        return MetricJudgement(metric, float(error), s, b, limit, SAFE,
                               f"{metric}: {band} <= {limit:g}")
    if e - SE_MULTIPLIER * s - b > limit:
        return MetricJudgement(metric, float(error), s, b, limit, UNSAFE,
                               f"{metric}: {band} > {limit:g}")
    return MetricJudgement(metric, float(error), s, b, limit, UNRESOLVED,
                           f"{metric}: {band} straddles the limit {limit:g} "
                           "(uncertainty too large to decide)")


def worst(judgements: Sequence[MetricJudgement]) -> MetricJudgement:
    """The worst of several seeds' judgements of one metric (severity, then |e| + 2 s + b;
    an unmeasured value counts as worse than any measured one of the same status)."""
    if not judgements:
        raise ValueError("worst(): no judgements (a metric measured on zero seeds)")

    def key(j: MetricJudgement) -> tuple[int, float]:
        upper = j.upper
        return _SEVERITY[j.status], upper if math.isfinite(upper) else math.inf

    return max(judgements, key=key)


@dataclass(frozen=True)
class Spread:
    """min / median / max of one metric over the solver's seeds."""

    metric: str
    minimum: float
    median: float
    maximum: float
    seeds: int

    def to_dict(self) -> dict[str, object]:
        return {"min": _num(self.minimum), "median": _num(self.median),
                "max": _num(self.maximum), "seeds": self.seeds}


def spread(metric: str, values: Sequence[float]) -> Spread:
    """Spread of |value| over seeds (non-finite values make every statistic NaN)."""
    vals = [abs(float(v)) for v in values]
    if not vals or not all(math.isfinite(v) for v in vals):
        nan = math.nan
        return Spread(metric, nan, nan, nan, len(vals))
    return Spread(metric, min(vals), statistics.median(vals), max(vals), len(vals))


@dataclass(frozen=True)
class ToleranceVerdict:
    """The verdict of one tolerance over all seeds of the solver's randomness."""

    tol: float
    status: str
    reasons: tuple[str, ...]
    metrics: tuple[MetricJudgement, ...]      # the worst seed of each limited metric
    spread: Mapping[str, Spread]
    seeds: int
    failures: tuple[str, ...]
    reference: ReferenceInfo
    fit_converged: bool = True

    @property
    def safe(self) -> bool:
        return self.status == SAFE

    def to_dict(self) -> dict[str, object]:
        return {"tol": self.tol, "status": self.status, "reasons": list(self.reasons),
                "metrics": [m.to_dict() for m in self.metrics],
                "spread": {k: v.to_dict() for k, v in self.spread.items()},
                "seeds": self.seeds, "failures": list(self.failures),
                "reference": self.reference.to_dict(), "fit_converged": self.fit_converged}


def tolerance_verdict(tol: float, per_seed: Sequence[Sequence[MetricJudgement]], *,
                      reference: ReferenceInfo, failures: Sequence[str] = (),
                      required: Sequence[str] = (), fit_converged: bool = True,
                      info: Mapping[str, Sequence[float]] | None = None) -> ToleranceVerdict:
    """The tolerance rule of the module docstring.

    Parameters
    ----------
    tol : float
    per_seed : sequence of sequences of MetricJudgement
        For each seed that finished, its judgement of every limited metric.
    reference : ReferenceInfo
    failures : sequence of str
        Why a seed did not finish (solver errors); any failure makes the tolerance unsafe.
    required : sequence of str
        Limited metrics that must be present on every seed; a missing one is unresolved.
    fit_converged : bool
    info : mapping, optional
        Further per-seed values (information only) whose spread is reported.
    """
    reasons: list[str] = []
    by_metric: dict[str, list[MetricJudgement]] = {}
    for seed_metrics in per_seed:
        for j in seed_metrics:
            by_metric.setdefault(j.metric, []).append(j)
    for name in required:
        have = len(by_metric.get(name, []))
        if have < len(per_seed) or not per_seed:
            by_metric.setdefault(name, []).append(judge_metric(name, math.nan, math.inf))
    worst_each = tuple(worst(js) for _, js in sorted(by_metric.items()))
    statuses = [j.status for j in worst_each]
    if failures:
        status = UNSAFE
        reasons.extend(f"solver failed: {f}" for f in failures)
    elif not per_seed:
        status = UNRESOLVED
        reasons.append("no seed finished: nothing was measured")
    elif not worst_each:
        status = UNRESOLVED
        reasons.append("no limited metric was measured")
    elif UNSAFE in statuses:
        status = UNSAFE
    elif UNRESOLVED in statuses:
        status = UNRESOLVED
    else:
        status = SAFE
    reasons.extend(j.reason + (f" (worst of {len(by_metric[j.metric])} seeds)"
                               if len(by_metric[j.metric]) > 1 else "")
                   for j in worst_each if j.status != SAFE or status == SAFE)
    if not reference.certified and status == SAFE:
        status = UNRESOLVED
        reasons.append(f"reference {reference.kind} is not certified")
    if not reference.exact and status == SAFE:
        status = UNRESOLVED
        reasons.append(LADDER_REASON)
    if not fit_converged:
        reasons.append(UNCONVERGED_REASON)
    spreads = {name: spread(name, [j.value for j in js]) for name, js in by_metric.items()
               if any(math.isfinite(j.value) for j in js)}
    for name, values in (info or {}).items():
        spreads[name] = spread(name, values)
    return ToleranceVerdict(tol=float(tol), status=status, reasons=tuple(reasons),
                            metrics=worst_each, spread=spreads, seeds=len(per_seed),
                            failures=tuple(failures), reference=reference,
                            fit_converged=fit_converged)


@dataclass(frozen=True)
class LadderRecommendation:
    """The recommendation rule's answer for one ladder of tolerances.

    ``tol`` is None when no tolerance qualifies. ``monotone`` is False when a looser
    tolerance is safe above a tighter one that is not (listed in ``non_monotone``).
    """

    tol: float | None
    monotone: bool
    non_monotone: tuple[float, ...]
    reason: str
    statuses: Mapping[float, str] = field(default_factory=dict)

    def to_dict(self) -> dict[str, object]:
        return {"tol": self.tol, "monotone": self.monotone,
                "non_monotone": list(self.non_monotone), "reason": self.reason,
                "statuses": {repr(k): v for k, v in self.statuses.items()}}


def recommend(statuses: Mapping[float, str]) -> LadderRecommendation:
    """The loosest safe tolerance with no unsafe or unresolved tighter tolerance.

    ``statuses`` maps tolerance -> status; any status other than ``safe`` (``unsafe``,
    ``unresolved``, ``failed``) blocks every looser tolerance.
    """
    ordered = sorted(statuses.items())                 # tightest first
    best: float | None = None
    blocked_at: float | None = None
    blocked_status = ""
    stray: list[float] = []
    for tol, status in ordered:
        if status == SAFE:
            if blocked_at is None:
                best = tol
            else:
                stray.append(tol)
        elif blocked_at is None:
            blocked_at, blocked_status = tol, status
    monotone = not stray
    if best is None:
        reason = ("no tolerance qualifies: the tightest, "
                  f"{ordered[0][0]:g}, is {ordered[0][1]}" if ordered else
                  "no tolerance was audited")
    else:
        reason = "loosest safe tolerance with every tighter one safe"
        if blocked_at is not None:
            reason += f" (the next looser, {blocked_at:g}, is {blocked_status})"
    if not monotone:
        reason += ("; non-monotone ladder: " + ", ".join(f"{t:g}" for t in stray)
                   + f" safe above {blocked_at:g} ({blocked_status}); not recommended")
    return LadderRecommendation(tol=best, monotone=monotone, non_monotone=tuple(stray),
                                reason=reason, statuses=dict(statuses))


# -- the audit of a ladder of tolerances on one dataset ----------------------------------
@dataclass(frozen=True)
class AuditData:
    """One dataset at the parameters under audit.

    ``holdout`` indexes the kriging points; kriging conditions on the other points, every
    other metric uses all n points.
    """

    points: np.ndarray
    y: np.ndarray
    kernel: Kernel
    mean: str
    holdout: np.ndarray
    fisher: np.ndarray
    probes: np.ndarray

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
    ``loglik_se`` the reference log-likelihood's own standard error (0 when exact).
    """

    full: Side
    kriging: KrigingSide
    train_matvec: Callable[[np.ndarray], np.ndarray]
    loglik_seconds: float
    loglik_se: float = 0.0


class PairedReference(Protocol):
    """A reference that gives ``ReferenceSides`` (dense Cholesky, tolerance ladder)."""

    info: ReferenceInfo

    def sides(self, tol: float) -> ReferenceSides: ...


@dataclass(frozen=True)
class ReferenceValues:
    """A value reference's numbers (the exact operator), each with its uncertainty.

    ``loglik`` carries its SE and deterministic bound; ``score_se`` the score's SE;
    ``krige_mean_bound`` a bound on each kriging mean's error; the kriging is of the
    held-out points conditioned on the other points.
    """

    loglik: ReferenceValue
    score: np.ndarray
    score_se: np.ndarray
    krige_mean: np.ndarray
    krige_mean_bound: np.ndarray
    krige_var: np.ndarray
    loglik_seconds: float


class ValueReference(Protocol):
    """A reference that gives ``ReferenceValues`` (no factorization to pair with)."""

    info: ReferenceInfo
    probes: int

    def values(self) -> ReferenceValues: ...


@runtime_checkable
class _HasValues(Protocol):
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
        return {"index": self.index, "seed": self.seed, "loglik": _num(self.loglik),
                "metrics": {m.name: _num(m.value) for m in self.metrics},
                "uncertainty": {m.name: _num(m.uncertainty or 0.0) for m in self.metrics
                                if m.threshold is not None},
                "status": {j.metric: j.status for j in self.judgements},
                "seconds": _num(self.seconds), "nbytes": self.nbytes,
                "notes": list(self.notes), "error": self.error or None}


@dataclass(frozen=True)
class ToleranceAudit:
    """A tolerance's verdict with every seed's audit and the timing summary."""

    verdict: ToleranceVerdict
    seeds: tuple[SeedAudit, ...]
    seconds: float                  # median over seeds of one log-likelihood
    speedup: float | None           # reference log-likelihood time / ``seconds``
    nbytes: int

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


def _seed_audit(index: int, seed: int, tol: float, data: AuditData, solver: ResolvedSolver,
                options: Mapping[str, object], ref: ReferenceSides,
                thresholds: Thresholds) -> SeedAudit:
    from harness.audit.sides import evaluate_side, kriging_side
    from harness.audit.tolerance_metrics import kriging_metrics, likelihood_metrics

    opts = seeded_options(solver.factory, options, seed)
    kernel, x = data.kernel, data.points
    train = data.train
    t0 = time.perf_counter()
    fac = solver.factorize(x, kernel, kernel.theta, tol=tol, **opts)
    side = evaluate_side(f"{solver.name} {tol:g}", fac, x, data.y, kernel, mean=data.mean,
                         probes=data.probes, factor_seconds=time.perf_counter() - t0)
    notes = tuple(getattr(fac, "notes", ()))
    nbytes = int(fac.nbytes)
    del fac
    metrics = likelihood_metrics(side, ref.full, kernel=kernel, fisher=data.fisher,
                                 probes=data.probes, thresholds=thresholds,
                                 reference_loglik_se=ref.loglik_se)
    fac_t = solver.factorize(x[train], kernel, kernel.theta, tol=tol, **opts)
    ks = kriging_side(f"{solver.name} {tol:g}", fac_t, x[train], data.y[train], kernel,
                      x[data.holdout], mean=data.mean)
    del fac_t
    cross = kernel.cross_covariance(x[train], x[data.holdout])
    metrics += kriging_metrics(ks, ref.kriging, cross=cross,
                               sigma_times_weights=np.asarray(ref.train_matvec(ks.weights)),
                               variance=kernel.variance, thresholds=thresholds)
    judgements = tuple(judge_metric(m.name, m.value, m.threshold, se=m.uncertainty or 0.0)
                       for m in metrics if m.threshold is not None)
    return SeedAudit(index=index, seed=seed, loglik=side.loglik, metrics=tuple(metrics),
                     judgements=judgements, seconds=side.loglik_seconds, nbytes=nbytes,
                     notes=notes)


def _value_seed_audit(index: int, seed: int, tol: float, data: AuditData,
                      solver: ResolvedSolver, options: Mapping[str, object],
                      ref: ReferenceValues, probes: int,
                      thresholds: Thresholds) -> SeedAudit:
    """One seed against a value reference: the solver's own likelihood and Hutch++ score
    (its SE and the reference's combined, independent) and kriging conditioned on the
    other points. A deterministic bound b enters a metric's uncertainty as b / 2, so that
    the rule's 2 x uncertainty covers it."""
    from harness.audit.sides import kriging_side
    from harness.audit.tolerance_metrics import shift_metrics
    from harness.likelihood import evaluate_likelihood

    opts = seeded_options(solver.factory, options, seed)
    kernel, x, train = data.kernel, data.points, data.train
    t0 = time.perf_counter()
    fac = solver.factorize(x, kernel, kernel.theta, tol=tol, **opts)
    ev = evaluate_likelihood(fac, x, data.y, kernel, mean=data.mean, score=True,
                             trace="hutchpp", probes=probes, rng=seed, fisher=False)
    seconds = time.perf_counter() - t0
    notes = tuple(getattr(fac, "notes", ()))
    nbytes = int(fac.nbytes)
    del fac
    metrics = [MetricValue("loglik_error", ev.loglik - ref.loglik.value,
                           thresholds.loglik_nats,
                           uncertainty=ref.loglik.se + ref.loglik.bound / 2.0,
                           note="nats; against the exact operator (its SE and CG bound)")]
    solver_se = (np.zeros_like(ref.score_se) if ev.trace_stderr is None
                 else 0.5 * np.asarray(ev.trace_stderr, dtype=float))
    e = np.asarray(ev.score, dtype=float) - ref.score
    e_se = np.sqrt(ref.score_se ** 2 + solver_se ** 2)
    metrics.extend(shift_metrics(e, e_se, kernel=kernel, fisher=data.fisher,
                                 thresholds=thresholds))
    fac_t = solver.factorize(x[train], kernel, kernel.theta, tol=tol, **opts)
    ks = kriging_side(f"{solver.name} {tol:g}", fac_t, x[train], data.y[train], kernel,
                      x[data.holdout], mean=data.mean)
    del fac_t
    sd = np.sqrt(np.maximum(ref.krige_var, 1e-300))
    z = np.abs(ks.mean - ref.krige_mean) / sd
    worst_i = int(np.argmax(z + ref.krige_mean_bound / sd))
    metrics.append(MetricValue("kriging_mean_sd", float(z[worst_i]), thresholds.kriging_mean_sd,
                               uncertainty=float(ref.krige_mean_bound[worst_i] / sd[worst_i])
                               / 2.0,
                               note="largest |m~ - m| / sqrt(v) at held-out points, "
                                    "conditioned on the other points (operator CG bound)"))
    judgements = tuple(judge_metric(m.name, m.value, m.threshold, se=m.uncertainty or 0.0)
                       for m in metrics if m.threshold is not None)
    return SeedAudit(index=index, seed=seed, loglik=ev.loglik, metrics=tuple(metrics),
                     judgements=judgements, seconds=seconds, nbytes=nbytes, notes=notes)


#: Limited metrics every seed must measure (a missing one makes the verdict unresolved).
REQUIRED_METRICS: tuple[str, ...] = ("loglik_error", "param_shift_se", "kriging_mean_sd")


def audit_tolerances(data: AuditData, solver: ResolvedSolver, tolerances: Sequence[float],
                     reference: PairedReference | ValueReference, *, seeds: Sequence[int],
                     solver_options: Mapping[str, object] | None = None,
                     thresholds: Thresholds | None = None, fit_converged: bool = True,
                     progress: Callable[[str], None] | None = None) -> EngineResult:
    """Audit ``tolerances`` of ``solver`` on ``data`` against ``reference`` over ``seeds``
    of the solver's randomness (``harness.audit.solver_seeds``), and recommend one.

    Each tolerance gets a ``ToleranceVerdict`` (module docstring: worst seed decides,
    ladder at best unresolved, unconverged fit stated); the recommendation follows
    ``recommend``.
    """
    from harness.audit.verdict import Thresholds
    from harness.solvers.fallback import SolverOutputError, SolverProtocolError
    from harness.solvers.registry import SolverRuntimeError

    th = thresholds or Thresholds()
    say = progress or (lambda _m: None)
    if not seeds:
        raise ValueError("audit_tolerances: at least one solver seed is needed")
    audits: list[ToleranceAudit] = []
    for tol in sorted({float(t) for t in tolerances}, reverse=True):
        rows: list[SeedAudit] = []
        failures: list[str] = []
        ref: ReferenceSides | ReferenceValues | None
        try:
            ref = (reference.values() if isinstance(reference, _HasValues)
                   else reference.sides(tol))
        except (SolverRuntimeError, SolverOutputError, np.linalg.LinAlgError) as exc:
            failures.append(f"the {reference.info.kind} reference failed at tol {tol:g}: {exc}")
            ref = None
        say(f"tolerance {tol:g} ({len(seeds)} solver seed(s))")
        for index, seed in enumerate(seeds if ref is not None else ()):
            say(f"solver seed {index + 1}/{len(seeds)} at tol {tol:g}")
            try:
                if isinstance(ref, ReferenceValues):
                    rows.append(_value_seed_audit(index, seed, tol, data, solver,
                                                  solver_options or {}, ref,
                                                  getattr(reference, "probes", 64), th))
                elif ref is not None:
                    rows.append(_seed_audit(index, seed, tol, data, solver,
                                            solver_options or {}, ref, th))
            except (SolverRuntimeError, SolverOutputError, SolverProtocolError,
                    np.linalg.LinAlgError) as exc:
                failures.append(f"seed {index} ({seed}): {exc}")
        info = {name: [m.value for r in rows for m in r.metrics if m.name == name]
                for name in {m.name for r in rows for m in r.metrics
                             if m.threshold is None}}
        verdict = tolerance_verdict(tol, [r.judgements for r in rows], reference=reference.info,
                                    failures=failures, required=REQUIRED_METRICS,
                                    fit_converged=fit_converged, info=info)
        seconds = statistics.median([r.seconds for r in rows]) if rows else math.nan
        speedup = (ref.loglik_seconds / seconds if ref is not None and rows and seconds > 0
                   else None)
        audits.append(ToleranceAudit(verdict=verdict, seeds=tuple(rows), seconds=seconds,
                                     speedup=speedup,
                                     nbytes=max((r.nbytes for r in rows), default=0)))
    rec = recommend({a.verdict.tol: a.verdict.status for a in audits})
    return EngineResult(reference=reference.info, tolerances=tuple(audits),
                        recommendation=rec, seeds=tuple(seeds), solver=solver.name)
