"""Regression comparison of a new run against a baseline run, task by task.

Tasks are paired on ``pair_key``, a version-free hash of what the problem is (case,
geometry, n, kernel, solver name, tolerance, options, seed; ``harness.grid.tasks
.pair_key_of``); solver and library versions are recorded beside the result and their
differences reported as ``version`` findings, which inform and never fail. A baseline
written before ``pair_key`` existed pairs on ``key`` (which hashes the version) and the
comparison says so. Two kinds of check, each a small frozen object with
``fails(current, baseline)``:

- ``AccuracyCheck``: an error metric regresses when current > factor * baseline and
  current > floor (the floor keeps round-off-level noise from failing a build), and
  when it was finite in the baseline and is NaN, infinite or absent now;
- ``SpeedCheck``: a time (or memory) regresses when median(current) / median(baseline)
  exceeds ``ratio`` and, when both sides have at least two repeats, the one-sided
  Mann-Whitney U test (scipy.stats.mannwhitneyu, alternative "greater") rejects equality
  at level ``alpha`` (Mann & Whitney, Ann. Math. Statist. 18, 1947). With a single
  measurement the ratio alone decides, and the finding says so. Speed is compared only
  between runs whose machine fingerprints (CPU model, architecture, logical CPUs,
  memory) agree; otherwise the speed checks are skipped with the reason, unless
  ``speed_across_machines`` asks for them explicitly.

The gate cannot pass silently: zero paired tasks, baseline tasks missing from the new run
(unless ``allow_missing``), and a task that was ok in the baseline and is not now are
regressions (``gate`` and ``status`` findings). Default factors and floors are common
practice chosen for covaudit, not a published standard; override them per metric
(``gate_checks(max_ratios={"logdet_abs_err": 3.0}, floors={}, speed=True)``, or the old
syntax ``parse_check("logdet_abs_err:3x")``).
"""

from __future__ import annotations

import json
import math
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
from scipy import stats

from harness.analysis.load import RunData
from harness.audit.metric_names import metric as metric_by_name
from harness.grid.store.columns import ACCURACY_COLUMNS, PHASES
from harness.infra.option_specs import OptionError, OptionSpec
from harness.model.json_values import json_text

COMPARISON_FILE = "comparison.json"

#: Absolute floors under which an error metric never counts as a regression
#: (common practice chosen here: round-off-level for float64 quantities, a small
#: fraction of the verdict limits for statistical ones).
ACCURACY_FLOORS: dict[str, float] = {
    "logdet_abs_err": 1e-6, "logdet_rel_err": 1e-10,
    "quad_abs_err": 1e-6, "quad_rel_err": 1e-10,
    "loglik_abs_err": 1e-6,
    "solve_fwd_err": 1e-10, "solve_residual": 1e-12,
    "factor_err": 1e-12,
    "score_err_fisher_max": 1e-4, "param_shift_se_max": 1e-4,
    "shift_nats": 1e-8, "microergodic_shift_se": 1e-4,
    "trace_rel_err_max": 1e-6, "trace_z_max": 3.0,
    "kriging_mean_err_sd_max": 1e-5, "kriging_var_rel_err_max": 1e-8,
    "mle_shift_se_max": 1e-3,
}
DEFAULT_ACCURACY_FACTOR = 2.0
DEFAULT_SPEED_RATIO = 1.25
DEFAULT_SPEED_METRICS: tuple[str, ...] = ("t_factor", "t_total")
COST_METRICS: frozenset[str] = frozenset(
    {f"t_{p}" for p in PHASES} | {"peak_rss_bytes", "peak_traced_bytes", "nbytes"})


class CheckSyntaxError(ValueError):
    """A regression-gate option (``--max-ratio``, ``--ignore-below``, ``--fail-on``)
    cannot be parsed."""


@dataclass(frozen=True)
class AccuracyCheck:
    """Error metric regression: current > factor * baseline and current > floor."""

    metric: str
    factor: float = DEFAULT_ACCURACY_FACTOR
    floor: float = 0.0

    def fails(self, current: float, baseline: float) -> bool:
        """True when ``current`` is a regression of ``baseline``.

        A baseline that is not finite cannot be regressed from (nothing was measured);
        a finite baseline whose current value is NaN or infinite is a regression.
        """
        if not math.isfinite(baseline):
            return False
        if not math.isfinite(current):
            return True
        return current > self.floor and current > self.factor * baseline

    def to_dict(self) -> dict[str, object]:
        return {"kind": "accuracy", **asdict(self)}


@dataclass(frozen=True)
class SpeedOutcome:
    """Ratio of medians and, where repeats allow, the Mann-Whitney p-value."""

    ratio: float
    p_value: float  # NaN when not tested
    tested: bool
    regressed: bool

    def to_dict(self) -> dict[str, object]:
        return asdict(self)


@dataclass(frozen=True)
class SpeedCheck:
    """Time/memory regression: median ratio > ``ratio`` and significant at ``alpha``."""

    metric: str
    ratio: float = DEFAULT_SPEED_RATIO
    alpha: float = 0.05

    def assess(self, current: Sequence[float], baseline: Sequence[float]) -> SpeedOutcome:
        cur = np.asarray([v for v in current if math.isfinite(v)], dtype=float)
        base = np.asarray([v for v in baseline if math.isfinite(v)], dtype=float)
        if cur.size == 0 or base.size == 0 or np.median(base) <= 0:
            return SpeedOutcome(float("nan"), float("nan"), False, False)
        ratio = float(np.median(cur) / np.median(base))
        if cur.size >= 2 and base.size >= 2:
            p = float(stats.mannwhitneyu(cur, base, alternative="greater").pvalue)
            return SpeedOutcome(ratio, p, True, bool(ratio > self.ratio and p <= self.alpha))
        return SpeedOutcome(ratio, float("nan"), False, bool(ratio > self.ratio))

    def fails(self, current: Sequence[float], baseline: Sequence[float]) -> bool:
        """True when the per-repeat measurements ``current`` regress from ``baseline``."""
        return self.assess(current, baseline).regressed

    def to_dict(self) -> dict[str, object]:
        return {"kind": "speed", **asdict(self)}


Check = AccuracyCheck | SpeedCheck


def parse_fail_on(spec: str) -> tuple[str, float, float | None]:
    """The old ``--fail-on`` syntax ``METRIC:FACTORx[:FLOOR]`` as ``(metric as given,
    factor, floor or None)``; ``--max-ratio`` and ``--ignore-below`` say the same in two
    options.

    >>> parse_fail_on("loglik_abs_err:3x:1e-9")
    ('loglik_abs_err', 3.0, 1e-09)
    """
    parts = spec.split(":")
    if len(parts) not in (2, 3) or not parts[1].lower().endswith("x"):
        raise CheckSyntaxError(f"--fail-on {spec!r}: expected METRIC:FACTORx[:FLOOR], "
                               "e.g. logdet_abs_err:2x or t_factor:1.25x")
    try:
        factor = float(parts[1][:-1])
        floor = float(parts[2]) if len(parts) == 3 else None
    except ValueError as exc:
        raise CheckSyntaxError(f"--fail-on {spec!r}: factor and floor must be numbers") \
            from exc
    if not (math.isfinite(factor) and factor >= 1):
        raise CheckSyntaxError(f"--fail-on {spec!r}: the factor must be >= 1, got {factor}")
    return parts[0].strip(), factor, floor


def parse_check(spec: str) -> Check:
    """The check an old ``--fail-on`` specification asks for (``parse_fail_on``).

    >>> parse_check("logdet_abs_err:2x")
    AccuracyCheck(metric='logdet_abs_err', factor=2.0, floor=1e-06)
    """
    name, factor, floor = parse_fail_on(spec)
    return make_check(name, factor=factor, floor=floor, where=f"--fail-on {spec!r}")


def make_check(name: str, *, factor: float | None, floor: float | None,
               where: str) -> Check:
    """The check of metric ``name`` (any of its names) with ``factor`` (None: the
    default, 2 for an error metric, 1.25 for a cost) and ``floor`` (None: the metric's
    default floor; error metrics only).

    Raises
    ------
    CheckSyntaxError
        Naming ``where`` (the option as given) for an unknown metric, or a floor on a
        cost metric.
    """
    metric = _contract_column(name)
    if metric in ACCURACY_COLUMNS:
        return AccuracyCheck(metric, DEFAULT_ACCURACY_FACTOR if factor is None else factor,
                             ACCURACY_FLOORS.get(metric, 0.0) if floor is None else floor)
    if metric in COST_METRICS:
        if floor is not None:
            raise CheckSyntaxError(f"{where}: a floor applies to error metrics only, not "
                                   f"{metric}")
        return SpeedCheck(metric, DEFAULT_SPEED_RATIO if factor is None else factor)
    known = ", ".join(sorted(ACCURACY_COLUMNS) + sorted(COST_METRICS))
    raise CheckSyntaxError(f"{where}: unknown metric {name!r}; known: {known}")


def parse_metric_setting(text: str, *, flag: str, spec: OptionSpec) -> tuple[str, float]:
    """``METRIC=VALUE`` (``--max-ratio loglik_abs_err=3``) as ``(metric, value)``, the
    value validated by ``spec`` (``harness.infra.option_specs``).

    Raises
    ------
    CheckSyntaxError
        One line naming ``flag`` and what it was given.
    """
    name, sep, value = text.partition("=")
    if not sep or not name.strip() or not value.strip():
        raise CheckSyntaxError(f"{flag} {text!r}: expected METRIC=VALUE, e.g. "
                               f"{flag} loglik_abs_err=3")
    try:
        number = spec.parse(value.strip())
    except OptionError as exc:
        raise CheckSyntaxError(f"{flag} {text!r}: {exc.core}") from None
    return name.strip(), float(number)


def gate_checks(*, max_ratios: Mapping[str, float], floors: Mapping[str, float],
                speed: bool) -> tuple[Check, ...]:
    """The gate's checks: the defaults (``default_checks``), each metric named in
    ``max_ratios`` or ``floors`` (any of its names) with its ratio and floor replaced,
    and no speed or memory check unless ``speed``.

    Raises
    ------
    CheckSyntaxError
        For an unknown metric or a floor on a cost metric, naming the option.
    """
    ratios = _by_column(max_ratios, flag="--max-ratio")
    lows = _by_column(floors, flag="--ignore-below")
    overrides = [make_check(column, factor=ratios.get(column), floor=lows.get(column),
                            where=f"--ignore-below {column}" if column in lows
                            else f"--max-ratio {column}")
                 for column in dict.fromkeys([*ratios, *lows])]
    return default_checks(accuracy_only=not speed, overrides=overrides)


def _by_column(values: Mapping[str, float], *, flag: str) -> dict[str, float]:
    """``values`` keyed by the results column each name reads (``_contract_column``); one
    metric given under two of its names with different values is refused."""
    out: dict[str, float] = {}
    for name, value in values.items():
        column = _contract_column(name)
        if column in out and out[column] != value:
            raise CheckSyntaxError(f"{flag} {name}: {column} is given twice (under two of "
                                   "its names) with different values")
        out[column] = value
    return out


def _contract_column(name: str) -> str:
    """The results column a gate argument names: a metric's canonical name or any of its
    old names (``harness.audit.metric_names``) reads its contract column, which every
    stored run holds; other names are kept as given."""
    try:
        return metric_by_name(name).column
    except KeyError:
        return name


def default_checks(*, accuracy_only: bool = False,
                   overrides: Iterable[Check] = ()) -> tuple[Check, ...]:
    """Every error metric at 2x over its floor, t_factor and t_total at 1.25x; overrides
    replace the default for their metric (and add metrics not checked by default)."""
    checks: dict[str, Check] = {m: AccuracyCheck(m, DEFAULT_ACCURACY_FACTOR, f)
                                for m, f in ACCURACY_FLOORS.items()}
    for m in DEFAULT_SPEED_METRICS:
        checks[m] = SpeedCheck(m)
    for c in overrides:
        checks[c.metric] = c
    return tuple(c for c in checks.values()
                 if not (accuracy_only and isinstance(c, SpeedCheck)))


@dataclass(frozen=True)
class Finding:
    """One regression of one task."""

    key: str
    task: str
    metric: str
    kind: str  # accuracy | speed | status
    baseline: float
    current: float
    ratio: float
    threshold: float
    p_value: float = float("nan")
    note: str = ""

    def to_dict(self) -> dict[str, object]:
        return asdict(self)


@dataclass(frozen=True)
class Comparison:
    """The outcome of comparing ``new`` against ``baseline``."""

    baseline: str
    new: str
    checks: tuple[dict[str, object], ...]
    paired: int
    findings: tuple[Finding, ...]
    missing: tuple[str, ...]  # pair keys in the baseline, absent from the new run
    extra: tuple[str, ...]    # pair keys only in the new run
    notes: tuple[str, ...] = field(default=())
    baseline_tasks: int = 0
    pair_column: str = "pair_key"
    versions: tuple[Finding, ...] = field(default=())  # informational, never a regression
    speed: str = "compared"  # compared | skipped: <reason> | not requested | across machines

    @property
    def regressed(self) -> bool:
        return bool(self.findings)

    def to_dict(self) -> dict[str, object]:
        return {"baseline": self.baseline, "new": self.new, "checks": list(self.checks),
                "paired": self.paired, "baseline_tasks": self.baseline_tasks,
                "pair_column": self.pair_column, "regressed": self.regressed,
                "findings": [f.to_dict() for f in self.findings],
                "versions": [f.to_dict() for f in self.versions], "speed": self.speed,
                "missing": list(self.missing), "extra": list(self.extra),
                "notes": list(self.notes)}

    @classmethod
    def from_dict(cls, data: Mapping[str, Any]) -> Comparison:
        return cls(baseline=str(data["baseline"]), new=str(data["new"]),
                   checks=tuple(data.get("checks", ())), paired=int(data.get("paired", 0)),
                   findings=tuple(_finding(f) for f in data.get("findings", ())),
                   missing=tuple(data.get("missing", ())), extra=tuple(data.get("extra", ())),
                   notes=tuple(data.get("notes", ())),
                   baseline_tasks=int(data.get("baseline_tasks", 0)),
                   pair_column=str(data.get("pair_column", "key")),
                   versions=tuple(_finding(f) for f in data.get("versions", ())),
                   speed=str(data.get("speed", "compared")))


def _task_label(row: pd.Series) -> str:
    tol = row.get("tol")
    tol_text = "" if tol is None or (isinstance(tol, float) and math.isnan(tol)) \
        else f" tol={tol:g}"
    knob, value = row.get("knob_name"), row.get("knob_value")
    if isinstance(knob, str) and knob not in ("", "tol") and isinstance(value, float) \
            and not math.isnan(value):
        tol_text = f" {knob}={value:g}"       # a solver whose knob is not tol (rho, ...)
    n = row.get("n")
    n_text = "" if n is None or (isinstance(n, float) and math.isnan(n)) else f" n={int(n)}"
    seed = row.get("seed")
    seed_text = "" if seed is None or (isinstance(seed, float) and math.isnan(seed)) \
        else f" seed={int(seed)}"
    return f"{row.get('case', '')}: {row.get('solver', '')}{tol_text}{n_text}{seed_text}"


def _repeats(run: RunData, key: str, metric: str, row: pd.Series) -> list[float]:
    if metric.startswith("t_") and not run.timings.empty:
        t = run.timings
        values = t.loc[(t["key"] == key) & (t["phase"] == metric[2:]), "seconds"]
        if len(values):
            return [float(v) for v in values]
    value = row.get(metric, float("nan"))
    return [float(value)] if pd.notna(value) else []


#: Fields of ``run.json``'s ``environment.cpu`` that make up a machine fingerprint.
FINGERPRINT_FIELDS: tuple[str, ...] = ("model", "machine", "logical_cpus", "memory_gib")


def machine_fingerprint(meta: Mapping[str, Any]) -> dict[str, object]:
    """CPU model, architecture, logical CPUs and memory (GiB, rounded) from a run.json
    (``environment.cpu``, or a top-level ``cpu`` of hand-written run files)."""
    cpu = ((meta.get("environment") or {}).get("cpu") or meta.get("cpu") or {})
    memory = cpu.get("memory_bytes")
    return {"model": cpu.get("model"), "machine": cpu.get("machine"),
            "logical_cpus": cpu.get("logical_cpus"),
            "memory_gib": None if memory is None else round(float(memory) / 2**30)}


def _fingerprint_difference(baseline: RunData, new: RunData) -> str:
    """'' when the fingerprints match, else what differs (or that one is unknown)."""
    base, cur = machine_fingerprint(baseline.meta), machine_fingerprint(new.meta)
    if all(v is None for v in base.values()) or all(v is None for v in cur.values()):
        return "a run.json holds no machine description (environment.cpu)"
    diffs = [f"{k} {base[k]!r} vs {cur[k]!r}" for k in FINGERPRINT_FIELDS
             if base[k] != cur[k]]
    return "; ".join(diffs)


def _pair_column(baseline: RunData, new: RunData) -> str:
    def has(run: RunData) -> bool:
        frame = run.results
        return "pair_key" in frame.columns and bool(
            len(frame) and frame["pair_key"].notna().all()
            and (frame["pair_key"].astype(str) != "").all())
    return "pair_key" if has(baseline) and has(new) else "key"


def _paired_frame(run: RunData, column: str) -> pd.DataFrame:
    frame = run.results.copy()
    frame[column] = frame[column].astype(str)
    return frame.drop_duplicates(column, keep="last").set_index(column)


def _text(row: pd.Series, name: str) -> str:
    value = row.get(name)
    return "" if value is None or (isinstance(value, float) and math.isnan(value)) \
        else str(value)


def _version_findings(baseline: RunData, new: RunData, base: pd.DataFrame,
                      cur: pd.DataFrame, common: Sequence[str]) -> list[Finding]:
    """Solver versions of paired tasks and library versions of the runs that differ."""
    out: list[Finding] = []
    seen: dict[tuple[str, str, str], int] = {}
    for key in common:
        b, c = base.loc[key], cur.loc[key]
        old, now_ = _text(b, "solver_version"), _text(c, "solver_version")
        if old != now_:
            item = (_text(c, "solver"), old, now_)
            seen[item] = seen.get(item, 0) + 1
    for (solver, old, now_), count in sorted(seen.items()):
        out.append(Finding("", f"solver {solver}", "solver_version", "version", float("nan"),
                           float("nan"), float("nan"), float("nan"),
                           note=f"{old or '?'} -> {now_ or '?'} ({count} paired task(s))"))
    old_libs = ((baseline.meta.get("environment") or {}).get("versions") or {})
    new_libs = ((new.meta.get("environment") or {}).get("versions") or {})
    for name in sorted(set(old_libs) | set(new_libs)):
        if old_libs.get(name) != new_libs.get(name):
            out.append(Finding("", f"library {name}", name, "version", float("nan"),
                               float("nan"), float("nan"), float("nan"),
                               note=f"{old_libs.get(name)} -> {new_libs.get(name)}"))
    return out


def _gate(metric: str, note: str) -> Finding:
    nan = float("nan")
    return Finding("", "(whole run)", metric, "gate", nan, nan, nan, nan, note=note)


def _accuracy_finding(key: str, label: str, check: AccuracyCheck, b: pd.Series,
                      c: pd.Series, present: bool) -> Finding | None:
    bv = float(b.get(check.metric, np.nan))
    cv = float(c.get(check.metric, np.nan)) if present else float("nan")
    if not check.fails(cv, bv):
        return None
    if not math.isfinite(cv):
        what = "absent from the new results" if not present else f"{cv} now"
        return Finding(key, label, check.metric, "accuracy", bv, cv, float("nan"),
                       check.factor, note=f"finite in the baseline, {what}")
    ratio = cv / bv if bv > 0 else float("inf")
    return Finding(key, label, check.metric, "accuracy", bv, cv, ratio, check.factor,
                   note=f"floor {check.floor:g}")


def compare_runs(baseline: RunData, new: RunData, *,
                 checks: Sequence[Check] | None = None, allow_missing: bool = False,
                 speed_across_machines: bool = False) -> Comparison:
    """Compare every task of ``new`` with the task of the same ``pair_key`` in ``baseline``.

    Parameters
    ----------
    baseline, new : RunData
    checks : sequence of Check, optional
        Default: ``default_checks()``.
    allow_missing : bool
        Baseline tasks absent from ``new`` are listed but not a regression.
    speed_across_machines : bool
        Apply the speed checks although the machine fingerprints differ.
    """
    checks = tuple(default_checks() if checks is None else checks)
    column = _pair_column(baseline, new)
    base, cur = _paired_frame(baseline, column), _paired_frame(new, column)
    common = sorted(set(base.index) & set(cur.index))
    missing = tuple(sorted(set(base.index) - set(cur.index)))
    notes: list[str] = []
    if column == "key":
        notes.append("paired on the versioned task key (a results.csv lacks pair_key): "
                     "a solver version change pairs nothing; regenerate the baseline")
    findings: list[Finding] = []
    if not common:
        findings.append(_gate("paired", f"0 of {len(base)} baseline task(s) paired with the "
                                        f"new run's {len(cur)}: nothing was compared"))
    if missing and not allow_missing:
        findings.append(_gate("missing", f"{len(missing)} baseline task(s) missing from the "
                                         "new run (--missing-tasks list accepts that)"))
    speed_checks = [ch for ch in checks if isinstance(ch, SpeedCheck)]
    speed = "compared" if speed_checks else "not requested"
    if speed_checks:
        difference = _fingerprint_difference(baseline, new)
        if difference and not speed_across_machines:
            speed = f"skipped: machine fingerprints differ ({difference}); " \
                    "--speed-checks any-machine compares anyway"
            notes.append(f"speed checks {speed}")
            checks = tuple(ch for ch in checks if not isinstance(ch, SpeedCheck))
        elif difference:
            speed = f"across machines ({difference})"
            notes.append(f"speed compared {speed}, as asked")
    new_columns = set(new.results.columns)
    untested = 0
    for key in common:
        b, c = base.loc[key], cur.loc[key]
        label = _task_label(c)
        if b["status"] == "ok" and c["status"] != "ok":
            findings.append(Finding(key, label, "status", "status", float("nan"),
                                    float("nan"), float("nan"), float("nan"),
                                    note=f"was ok, now {c['status'] or 'without status'}: "
                                         f"{c['error_type']} {c['error_message']}".strip()))
            continue
        if not (b["status"] == "ok" and c["status"] == "ok"):
            continue
        for check in checks:
            if isinstance(check, AccuracyCheck):
                found = _accuracy_finding(key, label, check, b, c, check.metric in new_columns
                                          and check.metric in c.index)
                if found is not None:
                    findings.append(found)
                continue
            b_key, c_key = str(b.get("key", key)), str(c.get("key", key))
            outcome = check.assess(_repeats(new, c_key, check.metric, c),
                                   _repeats(baseline, b_key, check.metric, b))
            if outcome.regressed:
                untested += not outcome.tested
                findings.append(Finding(
                    key, label, check.metric, "speed",
                    float(b.get(check.metric, np.nan)), float(c.get(check.metric, np.nan)),
                    outcome.ratio, check.ratio, outcome.p_value,
                    note="" if outcome.tested
                    else "single measurement: significance not tested"))
    versions = _version_findings(baseline, new, base, cur, common)
    if versions:
        notes.append("versions differ (paired regardless): " + "; ".join(
            f"{v.task} {v.note}" for v in versions))
    if untested:
        notes.append(f"{untested} speed finding(s) rest on single measurements")
    notes.extend(f"baseline: {n}" for n in baseline.notes)
    notes.extend(f"new: {n}" for n in new.notes)
    return Comparison(baseline=str(baseline.path), new=str(new.path),
                      checks=tuple(ch.to_dict() for ch in checks), paired=len(common),
                      findings=tuple(findings), missing=missing,
                      extra=tuple(sorted(set(cur.index) - set(base.index))),
                      notes=tuple(notes), baseline_tasks=len(base), pair_column=column,
                      versions=tuple(versions), speed=speed)


def write_comparison(comparison: Comparison, path: str | Path) -> Path:
    """Write ``comparison.json`` (sorted keys, so reruns give the same bytes)."""
    p = Path(path)
    if p.is_dir():
        p = p / COMPARISON_FILE
    tmp = p.with_suffix(".json.tmp")
    tmp.write_text(json_text(comparison, sort_keys=True)
                   + "\n", encoding="utf-8")
    tmp.replace(p)
    return p


def _finding(data: Mapping[str, Any]) -> Finding:
    values = dict(data)
    for name in ("baseline", "current", "ratio", "threshold", "p_value"):
        values[name] = float("nan") if values.get(name) is None else float(values[name])
    return Finding(**values)


def load_comparison(path: str | Path) -> Comparison:
    """Read a ``comparison.json`` written by ``write_comparison``."""
    p = Path(path)
    try:
        return Comparison.from_dict(json.loads(p.read_text(encoding="utf-8")))
    except (OSError, json.JSONDecodeError, KeyError, TypeError) as exc:
        raise ValueError(f"{p}: not a readable comparison file ({exc})") from exc
