"""The verdict rule: statuses, limits, the judgement of a metric and of a tolerance, and
the recommendation. Every verb that judges tolerances (``check``, every ``run`` task, the
run-level verdicts of ``harness.audit.verdict``) goes through these functions, so they give
the same verdict on the same numbers. This module imports nothing from the engine
(``harness.audit.engine``); the engine, the metrics and the reports import it.
DEVELOPERS.md ("The verdict rule") states the same rule in words.

Metric rule. A metric's error e is measured with an uncertainty: a standard error s
(stochastic trace estimates, an operator reference's Monte Carlo corrections; 0 for a
dense reference) and a deterministic bound b (e.g. a CG residual bound; 0 when exact).
Against a limit c:

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
not a published standard (``Thresholds``).
"""

from __future__ import annotations

import math
import statistics
import tomllib
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field, fields, replace
from pathlib import Path
from typing import Any

#: Verdict values, from best to worst severity order used by "the worst seed decides".
SAFE, UNRESOLVED, UNSAFE = "safe", "unresolved", "unsafe"
STATUSES: tuple[str, ...] = (SAFE, UNRESOLVED, UNSAFE)
#: The status of a tolerance whose solver under test crashed, raised, timed out or exited
#: early (exit code 3, ``harness.infra.exit_codes``); worse than ``unsafe``.
SOLVER_FAILED = "solver failed"
_SEVERITY = {SAFE: 0, UNRESOLVED: 1, UNSAFE: 2, SOLVER_FAILED: 3}
#: Half-width of the uncertainty interval in standard errors (common practice).
SE_MULTIPLIER = 2.0
#: Reference kinds the engine accepts, in decreasing trust; ``ladder`` (the solver at a
#: tighter tolerance) is the stand-in and never the sole basis of ``safe``.
REFERENCE_KINDS: tuple[str, ...] = ("dense", "statespace", "kronecker", "operator", "ladder")
EXACT_REFERENCES: frozenset[str] = frozenset({"dense", "statespace", "kronecker", "operator"})
UNCONVERGED_REASON = ("measured at an unconverged estimate (the fit did not converge): "
                      "never called safe there")
LADDER_REASON = ("ladder reference only (the solver at a tighter tolerance): extra "
                 "evidence, never the sole basis of safe")


class ThresholdError(ValueError):
    """A threshold setting is unknown or not a positive number."""


@dataclass(frozen=True)
class Thresholds:
    """Limits for a safe tolerance and for a calibrated trace estimator (all common practice).

    Attributes
    ----------
    loglik_nats : float
        Largest |log-likelihood error| in nats.
    param_shift_se : float
        Largest implied parameter shift in standard errors.
    kriging_mean_sd : float
        Largest kriging mean error in predictive standard deviations.
    certificate_max : float
        Largest scaled Cholesky residual of a certified dense reference.
    trace_z_limit : float
        |z| counted as inside.
    trace_min_fraction : float
        Smallest acceptable fraction of z-scores inside +-trace_z_limit.
    trace_alpha : float
        Significance level of the one-sided binomial test.
    """

    loglik_nats: float = 0.1
    param_shift_se: float = 0.1
    kriging_mean_sd: float = 0.05
    certificate_max: float = 30.0
    trace_z_limit: float = 2.0
    trace_min_fraction: float = 0.8
    trace_alpha: float = 0.05

    def __post_init__(self) -> None:
        for f in fields(self):
            value = getattr(self, f.name)
            if isinstance(value, bool) or not isinstance(value, int | float) \
                    or not math.isfinite(value) or value <= 0:
                raise ThresholdError(f"threshold {f.name}: expected a positive number, "
                                     f"got {value!r}")
        for name in ("trace_min_fraction", "trace_alpha"):
            if getattr(self, name) >= 1:
                raise ThresholdError(f"threshold {name}: expected a value below 1, got "
                                     f"{getattr(self, name)!r}")

    @classmethod
    def from_mapping(cls, table: Mapping[str, Any], *, source: str = "[verdict]"
                     ) -> Thresholds:
        """Build from a mapping such as a case file's ``[verdict]`` table."""
        known = {f.name for f in fields(cls)}
        unknown = sorted(set(table) - known)
        if unknown:
            raise ThresholdError(f"{source}: unknown setting(s) {', '.join(unknown)}; "
                                 f"known: {', '.join(sorted(known))}")
        return cls(**{k: table[k] for k in table})

    @classmethod
    def from_case_file(cls, path: str | Path) -> Thresholds:
        """Read the ``[verdict]`` table of a TOML case file (defaults when it has none)."""
        p = Path(path)
        try:
            data = tomllib.loads(p.read_text(encoding="utf-8"))
        except (OSError, tomllib.TOMLDecodeError) as exc:
            raise ThresholdError(f"{p}: cannot read the case file ({exc})") from exc
        return cls.from_case_text_table(data.get("verdict", {}), source=f"{p} [verdict]")

    @classmethod
    def from_case_text(cls, text: str) -> Thresholds:
        """Read the ``[verdict]`` table from case file text (as stored in run.json)."""
        try:
            data = tomllib.loads(text)
        except tomllib.TOMLDecodeError as exc:
            raise ThresholdError(f"case file text in run.json: not TOML ({exc})") from exc
        return cls.from_case_text_table(data.get("verdict", {}), source="case file [verdict]")

    @classmethod
    def from_case_text_table(cls, table: object, *, source: str) -> Thresholds:
        if not isinstance(table, Mapping):
            raise ThresholdError(f"{source}: expected a table, got {type(table).__name__}")
        return cls.from_mapping(table, source=source)

    def with_overrides(self, **values: float | None) -> Thresholds:
        """A copy with the given settings replaced (None leaves a setting as it is)."""
        return replace(self, **{k: v for k, v in values.items() if v is not None})

    def to_dict(self) -> dict[str, float]:
        return {f.name: getattr(self, f.name) for f in fields(self)}


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
        return {"metric": self.metric, "value": number_or_none(self.value),
                "se": number_or_none(self.se), "bound": number_or_none(self.bound),
                "limit": self.limit, "status": self.status, "reason": self.reason}


def number_or_none(value: float) -> float | None:
    """``value`` as a float when it is a finite number, else None (JSON's null)."""
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
        return {"min": number_or_none(self.minimum), "median": number_or_none(self.median),
                "max": number_or_none(self.maximum), "seeds": self.seeds}


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
        False makes a tolerance that would be safe unresolved, with
        ``UNCONVERGED_REASON``.
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
        # a setting that passes at a point the fit has not reached is not shown safe at
        # the maximum-likelihood estimate the user will use
        status = UNRESOLVED if status == SAFE else status
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


def recommend(statuses: Mapping[float, str], *, more_accurate: str = "smaller",
              knob: str = "tol") -> LadderRecommendation:
    """The loosest safe tolerance with no unsafe or unresolved tighter tolerance.

    ``statuses`` maps tolerance -> status; any status other than ``safe`` (``unsafe``,
    ``unresolved``, ``failed``) blocks every looser tolerance. For a solver whose knob is
    not ``tol`` (``harness.solvers.knobs.KnobSpec``) the keys are values of the knob
    named ``knob``; ``more_accurate`` ("smaller" or "larger") says which end is tight,
    and the reason names the knob ("no rho value qualifies").
    """
    if more_accurate not in ("smaller", "larger"):
        raise ValueError(f"more_accurate must be 'smaller' or 'larger', got "
                         f"{more_accurate!r}")
    ordered = sorted(statuses.items(),                 # tightest first
                     reverse=more_accurate == "larger")
    if knob != "tol":
        rec = _recommend_ordered(ordered, statuses)
        return replace(rec, reason=rec.reason.replace("tolerances", f"{knob} values")
                       .replace("tolerance", f"{knob} value"))
    return _recommend_ordered(ordered, statuses)


def _recommend_ordered(ordered: list[tuple[float, str]], statuses: Mapping[float, str]
                       ) -> LadderRecommendation:
    """``recommend`` on ``ordered`` (tightest first)."""
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
