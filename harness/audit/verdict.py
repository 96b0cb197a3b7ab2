"""Is a tolerance safe for a dataset? Verdicts with their evidence, and a recommendation.

A tolerance is *safe* for a dataset (``harness.audit.rule``; DEVELOPERS.md, "The verdict
rule") when, over every task of that dataset and tolerance,

- |log-likelihood error| <= 0.1 nat,
- every implied parameter shift |(F^-1 (g~ - g))_i| / SE_i <= 0.1,
- the kriging mean error |m~ - m| / sqrt(v) <= 0.05 predictive SD, and
- the reference itself is certified (dense: scaled Cholesky residual below 30, the pass
  ratio of the LAPACK test suite; structured exact references are exact by construction).

These limits are common practice chosen for this tool, not a published standard; every one
is configurable through ``Thresholds`` (case file ``[verdict]`` table or CLI options).
The rule is ``harness.audit.rule``'s, the same as ``check``'s: every finished task of a
tolerance is one seed and the worst decides; a metric that was not measured, an
uncertified reference or a ladder-only reference makes the verdict ``unresolved`` rather
than safe. The recommendation is the loosest safe tolerance with no
unsafe or unresolved tighter one (a non-monotone ladder is reported as such), with its
speed-up in median total time over the dense solver (over the tightest tolerance when no
dense timing exists).

A solver's accuracy knob (``harness.solvers.knobs``) need not be ``tol``: the verdicts are
per value of the knob (``knob_name``, ``knob_value``; for the Vecchia solver ``neighbours``, where
larger is more accurate), and ``tol`` holds the value only for a ``tol`` solver (NaN
otherwise). A row with no knob value is an exact solver's: the speed reference.

Stochastic trace estimators are checked separately: the fraction of tasks whose z-score
|estimate - exact| / reported SE lies within +-2 is tested against a minimum fraction with
a one-sided exact binomial test (scipy.stats.binomtest); a significantly low fraction means
the estimator's reported standard error is too small.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field

import numpy as np
import pandas as pd
from scipy import stats

from harness.audit.rule import (
    EXACT_REFERENCES,
    SAFE,
    UNRESOLVED,
    UNSAFE,
    MetricJudgement,
    ReferenceInfo,
    Thresholds,
    judge_metric,
    tolerance_verdict,
)
from harness.audit.rule import ThresholdError as ThresholdError
from harness.audit.rule import recommend as engine_recommend

#: Columns that identify a dataset (the problem the solver is asked to solve).
DATASET_COLUMNS: tuple[str, ...] = ("case", "kernel", "shape", "n", "d", "geometry", "mean",
                                    "variance", "lengthscale", "nugget")
STRUCTURED_REFERENCES: frozenset[str] = frozenset({"statespace", "kronecker"})
CERTIFICATE_COLUMN = "reference_certificate"
COMMON_PRACTICE = ("common practice chosen for covaudit, not a published standard; "
                   "set your own limits where your application requires")
LAPACK_BASIS = ("the pass ratio of LAPACK's own test suite (scaled residual < 30), "
                "adopted here as common practice")


@dataclass(frozen=True)
class Evidence:
    """One metric's contribution to a verdict."""

    metric: str
    value: float
    threshold: float
    passed: bool | None  # None when the metric was not available
    available: bool
    basis: str = COMMON_PRACTICE
    note: str = ""

    def to_dict(self) -> dict[str, object]:
        return {"metric": self.metric, "value": self.value, "threshold": self.threshold,
                "passed": self.passed, "available": self.available, "basis": self.basis,
                "note": self.note}


@dataclass(frozen=True)
class Verdict:
    """Whether one (dataset, solver, tolerance) is safe: ``safe``, ``unsafe``,
    ``unresolved`` (not measured, uncertainty too large, reference not certified or the
    ladder only; ``harness.audit.rule``) or ``failed`` (no task finished).

    ``knob_name`` and ``knob_value`` say which setting was judged; ``tol`` equals
    ``knob_value`` for a ``tol`` solver and is NaN for another knob."""

    dataset: Mapping[str, object]
    solver: str
    tol: float
    status: str
    evidence: tuple[Evidence, ...]
    tasks_ok: int
    tasks_failed: int
    t_total: float
    reasons: tuple[str, ...] = ()
    spread: Mapping[str, object] = field(default_factory=dict)
    knob_name: str = "tol"
    knob_value: float = math.nan

    @property
    def safe(self) -> bool:
        return self.status == "safe"

    def to_dict(self) -> dict[str, object]:
        return {"dataset": dict(self.dataset), "solver": self.solver, "tol": self.tol,
                "knob_name": self.knob_name, "knob_value": self.knob_value,
                "status": self.status, "evidence": [e.to_dict() for e in self.evidence],
                "tasks_ok": self.tasks_ok, "tasks_failed": self.tasks_failed,
                "t_total": self.t_total, "reasons": list(self.reasons),
                "spread": dict(self.spread)}


@dataclass(frozen=True)
class Recommendation:
    """The loosest safe tolerance of a solver on a dataset (``tol`` NaN when none is safe).

    ``knob_value`` is the recommended value of the solver's knob ``knob_name`` (NaN when
    none is safe); ``tol`` equals it for a ``tol`` solver and is NaN for another knob."""

    dataset: Mapping[str, object]
    solver: str
    tol: float
    speedup: float
    speedup_over: str
    reason: str
    monotone: bool = True
    knob_name: str = "tol"
    knob_value: float = math.nan

    def to_dict(self) -> dict[str, object]:
        return {"dataset": dict(self.dataset), "solver": self.solver, "tol": self.tol,
                "knob_name": self.knob_name, "knob_value": self.knob_value,
                "speedup": self.speedup, "speedup_over": self.speedup_over,
                "reason": self.reason, "monotone": self.monotone}


@dataclass(frozen=True)
class TraceCalibration:
    """Fraction of trace z-scores inside +-limit for one estimator setting.

    ``p_value`` is the one-sided binomial probability of so few inside if the true fraction
    were ``min_fraction``; ``flagged`` when the fraction is below it and p < alpha. The row
    value ``trace_z_max`` is a maximum over parameters, so even a calibrated estimator
    gives a fraction below the single-z 0.954 (about 0.954^p for p parameters).
    """

    solver: str
    tol: float
    trace_method: str
    probes: float
    count: int
    inside: int
    fraction: float
    p_value: float
    flagged: bool
    knob_name: str = "tol"
    knob_value: float = math.nan

    def to_dict(self) -> dict[str, object]:
        return {"solver": self.solver, "tol": self.tol, "knob_name": self.knob_name,
                "knob_value": self.knob_value, "trace_method": self.trace_method,
                "probes": self.probes, "count": self.count, "inside": self.inside,
                "fraction": self.fraction, "p_value": self.p_value, "flagged": self.flagged}


@dataclass(frozen=True)
class VerdictSet:
    """All verdicts, recommendations and trace checks of one run."""

    thresholds: Thresholds
    verdicts: tuple[Verdict, ...]
    recommendations: tuple[Recommendation, ...]
    trace: tuple[TraceCalibration, ...]

    def to_dict(self) -> dict[str, object]:
        return {"thresholds": self.thresholds.to_dict(),
                "verdicts": [v.to_dict() for v in self.verdicts],
                "recommendations": [r.to_dict() for r in self.recommendations],
                "trace": [t.to_dict() for t in self.trace]}


def _max_metric(frame: pd.DataFrame, column: str) -> float:
    if column not in frame:
        return float("nan")
    values = pd.to_numeric(frame[column], errors="coerce").abs().dropna()
    return float(values.max()) if len(values) else float("nan")


def _certificate_evidence(frame: pd.DataFrame, limit: float) -> Evidence:
    metric = "reference_certified"
    refs = sorted(set(frame["reference"].astype(str)) - {""})
    if refs and set(refs) <= STRUCTURED_REFERENCES:
        return Evidence(metric, float("nan"), limit, True, True, basis=LAPACK_BASIS,
                        note=f"exact structured reference ({', '.join(refs)})")
    value = _max_metric(frame, CERTIFICATE_COLUMN)
    if math.isnan(value):
        why = ("tolerance-ladder reference is not certified against an exact one"
               if "ladder" in refs else "reference certificate not recorded")
        return Evidence(metric, value, limit, None, False, basis=LAPACK_BASIS, note=why)
    return Evidence(metric, value, limit, bool(value < limit), True, basis=LAPACK_BASIS,
                    note=f"reference: {', '.join(refs) or 'unknown'}")


#: (results column, Thresholds attribute) of the limited metrics of a run's verdicts.
LIMITED_COLUMNS: tuple[tuple[str, str], ...] = (
    ("loglik_abs_err", "loglik_nats"), ("param_shift_se_max", "param_shift_se"),
    ("kriging_mean_err_sd_max", "kriging_mean_sd"))


def _reference_info(ok: pd.DataFrame, certificate: Evidence) -> ReferenceInfo:
    """The least trusted reference of the tasks, certified as ``certificate`` says."""
    refs = set(ok["reference"].astype(str)) - {""} if "reference" in ok else set()
    kind = ("ladder" if "ladder" in refs or not refs or not refs <= EXACT_REFERENCES
            else sorted(refs)[0])
    return ReferenceInfo(kind, certificate.passed is True, certificate.note)


def _tolerance_verdict(dataset: dict[str, object], solver: str, knob: str, value: float,
                       ok: pd.DataFrame, failed: int, th: Thresholds) -> Verdict:
    """One (dataset, solver, knob value) by the rule (``harness.audit.rule``):
    each finished task is one seed, the worst decides; failed tasks keep it from safe."""
    per_task = []
    for _, row in ok.iterrows():
        per_task.append([judge_metric(col, _number(row, col), getattr(th, attr),
                                      **_uncertainty(row, col))
                         for col, attr in LIMITED_COLUMNS])
    cert = _certificate_evidence(ok, th.certificate_max)
    tv = tolerance_verdict(value, per_task, reference=_reference_info(ok, cert),
                           required=[c for c, _ in LIMITED_COLUMNS])
    status, reasons = tv.status, list(tv.reasons)
    if failed and status == SAFE:
        status = UNRESOLVED
    if failed:
        reasons.append(f"{failed} task(s) of this "
                       f"{'tolerance' if knob == 'tol' else knob + ' value'} failed")
    order = [c for c, _ in LIMITED_COLUMNS]
    evidence = tuple(_evidence(j) for j in sorted(tv.metrics,
                                                  key=lambda j: order.index(j.metric)))
    evidence += (cert,)
    return Verdict(dataset, solver, value if knob == "tol" else math.nan, status, evidence,
                   len(ok), failed, _median(ok, "t_total"), reasons=tuple(reasons),
                   spread={k: v.to_dict() for k, v in tv.spread.items()},
                   knob_name=knob, knob_value=value)


#: results columns holding the reference's own uncertainty of a limited metric (the exact
#: operator reference; absent or 0 for dense and structured references).
UNCERTAINTY_COLUMNS: dict[str, tuple[str, str]] = {
    "loglik_abs_err": ("reference_loglik_se", "reference_loglik_bound")}


def _number(row: pd.Series, column: str) -> float:
    return float(pd.to_numeric(row.get(column), errors="coerce"))


def _uncertainty(row: pd.Series, column: str) -> dict[str, float]:
    """``se`` and ``bound`` of ``column`` for ``judge_metric``: 0 when not recorded."""
    if column not in UNCERTAINTY_COLUMNS:
        return {}
    se_col, bound_col = UNCERTAINTY_COLUMNS[column]
    values = {}
    for name, col in (("se", se_col), ("bound", bound_col)):
        value = _number(row, col) if col in row.index else math.nan
        if math.isnan(value) and str(row.get("reference", "")) != "operator":
            value = 0.0          # exact references: no uncertainty recorded or needed
        values[name] = value     # an operator row without its SE stays unresolved
    return values


def _evidence(j: MetricJudgement) -> Evidence:
    available = math.isfinite(j.value)
    passed = {SAFE: True, UNSAFE: False}.get(j.status) if available else None
    return Evidence(j.metric, j.value, j.limit, passed, available,
                    note="" if j.status == SAFE else j.reason)


def _median(frame: pd.DataFrame, column: str) -> float:
    values = frame[column].dropna() if column in frame else pd.Series(dtype=float)
    return float(values.median()) if len(values) else float("nan")


def _dataset_dict(key: tuple[object, ...]) -> dict[str, object]:
    return {c: (v.item() if isinstance(v, np.generic) else v)
            for c, v in zip(DATASET_COLUMNS, key, strict=True)}


def with_knob_columns(results: pd.DataFrame) -> pd.DataFrame:
    """``results`` with ``knob_name`` and ``knob_value`` filled in: a row written before the
    knob columns (``harness.grid.store.columns``) is a ``tol`` solver's, its value ``tol``."""
    frame = results.copy()
    tol = pd.to_numeric(frame["tol"], errors="coerce") if "tol" in frame \
        else pd.Series(np.nan, index=frame.index)
    names = frame["knob_name"] if "knob_name" in frame else pd.Series("", index=frame.index)
    names = names.map(lambda v: v if isinstance(v, str) and v else "tol")
    values = pd.to_numeric(frame["knob_value"], errors="coerce") if "knob_value" in frame \
        else pd.Series(np.nan, index=frame.index)
    frame["knob_name"] = names
    frame["knob_value"] = values.where(values.notna() | (names != "tol"), tol)
    return frame


def knob_direction(solver: str, knob_name: str) -> str | None:
    """Which direction of the knob is more accurate (``KnobSpec.more_accurate``): "smaller"
    for ``tol``; for another knob the solver's declaration, None when the solver cannot be
    loaded or declares another knob."""
    if knob_name == "tol":
        return "smaller"
    from harness.solvers.plugins import SolverLoadError
    from harness.solvers.registry import resolve_solver

    try:
        knob = resolve_solver(solver).knob
    except (SolverLoadError, TypeError):
        return None
    return knob.more_accurate if knob.name == knob_name else None


def judge(results: pd.DataFrame, *, thresholds: Thresholds | None = None) -> VerdictSet:
    """Verdicts for every (dataset, compressed solver, knob value) of a results table.

    Parameters
    ----------
    results : DataFrame
        Rows as in ``results.csv`` (``harness.analysis.load_run(...).results``).
    thresholds : Thresholds, optional
        Defaults to ``Thresholds()``.
    """
    th = thresholds or Thresholds()
    verdicts: list[Verdict] = []
    recommendations: list[Recommendation] = []
    frame = with_knob_columns(results)
    for c in DATASET_COLUMNS:
        if c not in frame:
            frame[c] = ""
    compressed = frame[frame["knob_value"].notna()]
    exact = frame[frame["knob_value"].isna() & (frame["status"] == "ok")]
    for dkey, dframe in compressed.groupby(list(DATASET_COLUMNS), dropna=False, sort=True):
        dataset = _dataset_dict(dkey)
        for (solver, knob), sframe in dframe.groupby(["solver", "knob_name"], sort=True):
            per_value: list[Verdict] = []
            for value, vframe in sframe.groupby("knob_value", sort=True):
                ok = vframe[vframe["status"] == "ok"]
                failed = int((vframe["status"] == "failed").sum())
                tol = float(value) if knob == "tol" else math.nan
                if ok.empty:
                    per_value.append(Verdict(dataset, str(solver), tol, "failed", (),
                                             0, failed, float("nan"),
                                             reasons=("no task finished",),
                                             knob_name=str(knob), knob_value=float(value)))
                    continue
                per_value.append(_tolerance_verdict(dataset, str(solver), str(knob),
                                                    float(value), ok, failed, th))
            verdicts.extend(per_value)
            recommendations.append(_recommend(dataset, str(solver), str(knob), per_value,
                                              exact, dkey))
    return VerdictSet(th, tuple(verdicts), tuple(recommendations),
                      trace_calibration(frame, thresholds=th))


def _recommend(dataset: dict[str, object], solver: str, knob: str,
               per_value: Sequence[Verdict], exact: pd.DataFrame, dkey: tuple[object, ...]
               ) -> Recommendation:
    def answer(reason: str, *, best: Verdict | None = None, speedup: float = math.nan,
               over: str = "", monotone: bool = True) -> Recommendation:
        return Recommendation(dataset, solver, math.nan if best is None else best.tol,
                              speedup, over, reason, monotone=monotone, knob_name=knob,
                              knob_value=math.nan if best is None else best.knob_value)

    direction = knob_direction(solver, knob)
    if direction is None:
        return answer(f"which direction of {knob} is more accurate is unknown: solver "
                      f"{solver!r} cannot be loaded or declares another knob")
    rule = engine_recommend({v.knob_value: v.status for v in per_value},
                            more_accurate=direction, knob=knob)
    if rule.tol is None:
        statuses = ", ".join(f"{v.knob_value:g}: {v.status}" for v in per_value)
        return answer(f"{rule.reason} ({statuses})", monotone=rule.monotone)
    best = next(v for v in per_value if v.knob_value == rule.tol)
    mask = np.ones(len(exact), dtype=bool)
    for c, v in zip(DATASET_COLUMNS, dkey, strict=True):
        col = exact[c]
        mask &= (col.isna().to_numpy() if isinstance(v, float) and math.isnan(v)
                 else (col == v).to_numpy())
    dense = exact[mask]
    if "dense" in set(dense["solver"]):
        dense = dense[dense["solver"] == "dense"]
    t_dense = _median(dense, "t_total")
    if not math.isnan(t_dense):
        return answer(rule.reason, best=best, speedup=t_dense / best.t_total,
                      over=str(dense["solver"].iloc[0]), monotone=rule.monotone)
    tight = (min if direction == "smaller" else max)(per_value, key=lambda v: v.knob_value)
    noun = "tolerance" if knob == "tol" else f"{knob} value"
    return answer(rule.reason + f" (no dense timing: speed-up over the tightest {noun})",
                  best=best, speedup=tight.t_total / best.t_total,
                  over=f"{solver} {knob}={tight.knob_value:g}", monotone=rule.monotone)


def trace_calibration(results: pd.DataFrame, *, thresholds: Thresholds | None = None
                      ) -> tuple[TraceCalibration, ...]:
    """Binomial check of trace z-scores per (solver, knob value, trace_method, probes)."""
    th = thresholds or Thresholds()
    results = with_knob_columns(results)
    rows = results[(results["status"] == "ok")
                   & ~results["trace_method"].isin(["", "exact"])
                   & results["trace_z_max"].notna()]
    out: list[TraceCalibration] = []
    for (solver, knob, value, method, probes), g in rows.groupby(
            ["solver", "knob_name", "knob_value", "trace_method", "probes"], dropna=False,
            sort=True):
        z = g["trace_z_max"].abs().to_numpy()
        inside = int(np.sum(z <= th.trace_z_limit))
        count = int(z.size)
        fraction = inside / count
        p = float(stats.binomtest(inside, count, th.trace_min_fraction,
                                  alternative="less").pvalue)
        out.append(TraceCalibration(str(solver), float(value) if knob == "tol" else math.nan,
                                    str(method), float(probes), count, inside, fraction, p,
                                    bool(fraction < th.trace_min_fraction
                                         and p < th.trace_alpha),
                                    knob_name=str(knob), knob_value=float(value)))
    return tuple(out)
