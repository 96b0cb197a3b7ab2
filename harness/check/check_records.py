"""Result records of a check: metrics with thresholds, one row per tolerance, the refit
and the whole check."""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

from harness.audit.metric_names import canonical_name
from harness.audit.metric_values import MetricValue, _num

__all__ = ["UNCONVERGED_REMEDY", "CheckResult", "MetricValue", "RefitResult",
           "ToleranceResult"]

#: What to do when the fit did not converge (``CheckResult.fit_converged`` is False, so no
#: verdict is safe); the terminal, the report's warning and its advice all say it.
UNCONVERGED_REMEDY = ("rerun with a larger --fit-time-budget, or fix the parameters "
                      "(--fixed-params NAME=VALUE ...)")


@dataclass(frozen=True)
class ToleranceResult:
    """The verdict for one tolerance.

    ``status`` is the engine's verdict (``harness.audit.rule``: ``safe``, ``unsafe`` or
    ``unresolved``, with ``reasons``); ``safe`` is ``status == "safe"``. ``metrics`` hold
    the value of the seed that decides each limited metric; ``seeds`` every seed's values
    and ``spread`` their min / median / max. ``error`` holds the reason when the solver
    failed (e.g. compression breakdown), which makes the tolerance unsafe.

    ``knob_name`` and ``knob_value`` name the solver's accuracy knob and the value
    audited (``harness.solvers.knobs``): for a ``tol`` solver ``tol == knob_value``; for
    a solver with another knob (``neighbours``) ``tol`` is None.
    """

    tol: float | None
    safe: bool
    reference: str
    metrics: tuple[MetricValue, ...]
    seconds: float
    speedup: float | None
    nbytes: int
    error: str = ""
    status: str = ""
    reasons: tuple[str, ...] = ()
    seeds: tuple[dict[str, Any], ...] = ()
    spread: dict[str, Any] = field(default_factory=dict)
    knob_name: str = "tol"
    knob_value: float | None = None

    @property
    def value(self) -> float | None:
        """The knob's value (``tol`` for a ``tol`` solver that left ``knob_value`` unset)."""
        return self.tol if self.knob_value is None else self.knob_value

    def metric(self, name: str) -> MetricValue | None:
        return next((m for m in self.metrics if m.name == name), None)

    def to_dict(self) -> dict[str, Any]:
        out: dict[str, Any] = {"tol": self.tol, "knob_name": self.knob_name,
                               "knob_value": self.value, "safe": self.safe,
                               "reference": self.reference,
                               "seconds": _num(self.seconds), "speedup": _num(self.speedup),
                               "nbytes": self.nbytes, "error": self.error or None,
                               "status": self.status or ("safe" if self.safe else "unsafe"),
                               "reasons": list(self.reasons), "seeds": list(self.seeds),
                               "spread": self.spread}
        for m in self.metrics:   # under its own name and its canonical one (both kept)
            out[m.name] = m.to_dict()
            out.setdefault(canonical_name(m.name), out[m.name])
        return out


@dataclass(frozen=True)
class RefitResult:
    """End-to-end refit with the recommended tolerance (or knob value), compared with the
    reference fit; ``tol`` is None for a solver whose knob is not ``tol``."""

    tol: float | None
    params: dict[str, Any]
    shift_se: dict[str, float]
    max_shift_se: float
    loglik_change: float
    microergodic_shift_se: float | None
    evaluations: int
    seconds: float
    accepted_steps: int = 0
    converged: bool = True
    note: str = ""
    knob_name: str = "tol"
    knob_value: float | None = None

    def to_dict(self) -> dict[str, Any]:
        return {"tol": self.tol, "knob_name": self.knob_name,
                "knob_value": self.tol if self.knob_value is None else self.knob_value,
                "accepted_steps": self.accepted_steps,
                "converged": self.converged, "note": self.note,
                "params": self.params, "shift_se": self.shift_se,
                "max_shift_se": self.max_shift_se, "loglik_change": self.loglik_change,
                "microergodic_shift_se": _num(self.microergodic_shift_se)
                if self.microergodic_shift_se is not None else None,
                "evaluations": self.evaluations, "seconds": self.seconds}


@dataclass(frozen=True)
class CheckResult:
    """Everything ``covaudit check`` found (``to_dict`` is the JSON output).

    ``recommended_tolerance`` holds the pick only when the solver's knob is ``tol``;
    ``recommended_knob`` = {"solver", "name", "value"} always says what was picked (None
    when nothing is safe).
    """

    source: str
    n: int
    n_fit: int
    n_holdout: int
    d: int
    coord_system: str
    kernel: str
    mean: str
    params: dict[str, Any]
    se: dict[str, Any]
    loglik: float
    reference: str
    fit: dict[str, Any]
    tolerances: tuple[ToleranceResult, ...]
    recommended_tolerance: float | None
    speedup: float | None
    speedup_over: str
    refit: RefitResult | None
    thresholds: dict[str, float]
    growth: dict[str, Any] = field(default_factory=dict)
    holdout: dict[str, Any] = field(default_factory=dict)
    truth: dict[str, Any] | None = None
    seconds: float = 0.0
    notes: tuple[str, ...] = ()
    solver: dict[str, Any] = field(default_factory=dict)
    solver_seeds: tuple[int, ...] = ()
    warnings: tuple[str, ...] = ()
    recommendation: dict[str, Any] = field(default_factory=dict)
    fit_converged: bool = True
    reference_detail: dict[str, Any] = field(default_factory=dict)
    #: Held-out points with a kriging variance (a seeded subset of the ``n_holdout``).
    n_variance_points: int = 0
    #: Which reference served which metric group ("loglik", "score", "kriging"), each
    #: with its detail (``harness.audit.audit_references.reference_by_metric``).
    reference_by_metric: dict[str, Any] = field(default_factory=dict)
    recommended_knob: dict[str, Any] | None = None
    knob: dict[str, Any] = field(default_factory=lambda: {"name": "tol"})
    #: One line per failure of the solver under test outside the audit of a knob value
    #: (the refit); each makes the exit code 3 (``harness.infra.exit_codes``).
    solver_failures: tuple[str, ...] = ()
    #: Every solver of the check in the order listed (``harness.check.frontier``): its
    #: knob, its points (the rows above with their timing and whether they are
    #: non-dominated), its pick and why it has none. The single-solver keys above describe
    #: the recommended solver (the first listed when none is safe).
    solvers: tuple[dict[str, Any], ...] = ()
    #: The recommendation across solvers (``harness.check.frontier.FrontierPick``).
    frontier: dict[str, Any] = field(default_factory=dict)
    #: The cost plan printed before any work (``harness.check.cost_plan.CostPlan.to_dict``):
    #: reference per metric, fit plan, predicted peak memory and seconds per stage.
    plan: dict[str, Any] | None = None
    #: Probes of the solver's score estimate: of the difference trace against a paired
    #: (dense) reference, of Hutch++ against a value reference (at least 64).
    score_probes: int | None = None

    @property
    def knob_name(self) -> str:
        return str(self.knob.get("name", "tol"))

    @property
    def recommended_value(self) -> float | None:
        """The recommended knob value (a tolerance for a ``tol`` solver), or None."""
        if self.recommended_knob is not None:
            return self.recommended_knob.get("value")
        return self.recommended_tolerance

    def to_dict(self) -> dict[str, Any]:
        return {
            "source": self.source, "n": self.n, "n_fit": self.n_fit,
            "n_holdout": self.n_holdout, "d": self.d, "coord_system": self.coord_system,
            "kernel": self.kernel, "mean": self.mean, "params": self.params, "se": self.se,
            "loglik": self.loglik, "reference": self.reference, "fit": self.fit,
            "recommended_tolerance": self.recommended_tolerance,
            "recommended_knob": self.recommended_knob, "knob": self.knob,
            "speedup": _num(self.speedup) if self.speedup is not None else None,
            "speedup_over": self.speedup_over,
            "tolerances": [t.to_dict() for t in self.tolerances],
            "refit": self.refit.to_dict() if self.refit else None,
            "thresholds": self.thresholds, "growth": self.growth, "holdout": self.holdout,
            "truth": self.truth, "seconds": self.seconds, "notes": list(self.notes),
            "solver": self.solver, "solver_seeds": list(self.solver_seeds),
            "warnings": list(self.warnings), "recommendation": self.recommendation,
            "fit_converged": self.fit_converged, "reference_detail": self.reference_detail,
            "n_variance_points": self.n_variance_points,
            "reference_by_metric": self.reference_by_metric,
            "solver_failures": list(self.solver_failures),
            "solvers": list(self.solvers), "frontier": self.frontier,
            "plan": self.plan, "score_probes": self.score_probes,
        }
