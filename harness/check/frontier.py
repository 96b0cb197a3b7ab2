"""Which solver, at which setting: the accuracy-time frontier of a check of several solvers.

Every listed solver is audited on the same fit, reference, holdout and probes; each of its
knob values gets the usual verdict (``harness.audit.rule``) and a time, the median of
repeated fit evaluations (``harness.check.solver_timing``). Then:

* **Within a solver** the existing rule picks the loosest safe knob value with no unsafe
  or unresolved tighter one (``harness.audit.engine.recommend``); a solver without one is
  named with the rule's reason. "unresolved" never becomes "safe".
* **Across solvers** the fastest pick wins. The two fastest picks are compared by their
  timing repeats with the two-sided Mann-Whitney U test (Mann and Whitney 1947, Ann.
  Math. Stat. 18; ``scipy.stats.mannwhitneyu``) at alpha = 0.05; when they are not
  distinguishable (p >= alpha, which is certain with fewer than 4 repeats each: the
  smallest two-sided exact p of 3 against 3 is 2/20 = 0.1) both are named.
* **Non-dominated points.** A point is dominated when another point (of any solver) is at
  most as slow and at most as far off on every limited metric, as a fraction of its limit,
  and strictly better in one of the two; a point without a time or without finite
  limited metrics is never marked non-dominated.
"""

from __future__ import annotations

import math
import statistics
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

#: Significance level of the tie test between the two fastest picks (common practice).
TIE_ALPHA = 0.05
#: Metrics whose limit-relative size places a point on the frontier (the figure's panels).
FRONTIER_METRICS = ("loglik_error", "param_shift_se", "kriging_mean_sd")


@dataclass(frozen=True)
class SolverPick:
    """One solver's pick: its knob value and the timing repeats there (None: no pick)."""

    solver: str
    knob_name: str
    value: float | None
    repeats: tuple[float, ...] = ()
    reason: str = ""

    @property
    def seconds(self) -> float:
        """Median of the timing repeats (NaN without any)."""
        return statistics.median(self.repeats) if self.repeats else math.nan

    def to_dict(self) -> dict[str, Any]:
        return {"solver": self.solver, "knob_name": self.knob_name, "value": self.value,
                "seconds": _finite_or_none(self.seconds)}


@dataclass(frozen=True)
class FrontierPick:
    """The recommendation across solvers (``frontier`` in check.json)."""

    recommended: SolverPick | None
    tied_with: tuple[tuple[SolverPick, float], ...] = ()
    no_safe: tuple[SolverPick, ...] = ()
    exact_seconds: float | None = None
    exact: str = ""
    speedup_over_exact: float | None = None
    speedup_over_solvers: Mapping[str, float] = field(default_factory=dict)
    timing_repeats: int = 0
    statement: str = ""
    #: The CPU and thread settings the times were measured with.
    machine: Mapping[str, Any] = field(default_factory=dict)

    def to_dict(self) -> dict[str, Any]:
        return {
            "recommended": None if self.recommended is None else self.recommended.to_dict(),
            "tied_with": [pick.to_dict() | {"p_value": p} for pick, p in self.tied_with],
            "exact_seconds": self.exact_seconds, "exact": self.exact,
            "speedup_over_exact": self.speedup_over_exact,
            "speedup_over_solvers": dict(self.speedup_over_solvers),
            "no_safe": [{"solver": pick.solver, "reason": pick.reason}
                        for pick in self.no_safe],
            "timing_repeats": self.timing_repeats, "statement": self.statement,
            "machine": dict(self.machine),
        }


def _finite_or_none(value: float | None) -> float | None:
    return None if value is None or not math.isfinite(value) else float(value)


def limit_ratio(metrics: Mapping[str, Any]) -> float:
    """max over ``FRONTIER_METRICS`` present with a limit of |value| / limit (inf when one
    of them is not finite; NaN when none has a limit)."""
    ratios = []
    for name in FRONTIER_METRICS:
        entry = metrics.get(name)
        if not isinstance(entry, Mapping) or not entry.get("threshold"):
            continue
        value = entry.get("value")
        if value is None or not math.isfinite(float(value)):
            return math.inf
        ratios.append(abs(float(value)) / float(entry["threshold"]))
    return max(ratios) if ratios else math.nan


def nondominated(points: Sequence[tuple[float, float]]) -> list[bool]:
    """Whether each (seconds, limit ratio) point is non-dominated (module docstring)."""
    usable = [math.isfinite(t) and math.isfinite(e) for t, e in points]
    marks = []
    for i, (t, e) in enumerate(points):
        if not usable[i]:
            marks.append(False)
            continue
        dominated = any(usable[j] and u <= t and f <= e and (u < t or f < e)
                        for j, (u, f) in enumerate(points) if j != i)
        marks.append(not dominated)
    return marks


def tie_p_value(a: Sequence[float], b: Sequence[float]) -> float:
    """Two-sided Mann-Whitney U p-value of two timing samples (1.0 when either is empty
    or both are constant and equal, where the test has nothing to tell apart)."""
    if not a or not b:
        return 1.0
    if len(set(a) | set(b)) == 1:
        return 1.0
    from scipy.stats import mannwhitneyu  # loads only with several solvers

    return float(mannwhitneyu(list(a), list(b), alternative="two-sided").pvalue)


def recommend_across(picks: Sequence[SolverPick], *, exact_seconds: float | None,
                     exact: str, timing_repeats: int) -> FrontierPick:
    """The fastest pick, its tie with the runner-up, and the speed-ups (module docstring)."""
    chosen = sorted((p for p in picks if p.value is not None),
                    key=lambda p: (not math.isfinite(p.seconds), p.seconds))
    no_safe = tuple(p for p in picks if p.value is None)
    if not chosen:
        names = "; ".join(f"{p.solver}: {p.reason}" for p in no_safe)
        return FrontierPick(recommended=None, no_safe=no_safe,
                            exact_seconds=_finite_or_none(exact_seconds), exact=exact,
                            timing_repeats=timing_repeats,
                            statement=f"no solver has a safe setting ({names})")
    best = chosen[0]
    tied: tuple[tuple[SolverPick, float], ...] = ()
    if len(chosen) > 1:
        p = tie_p_value(best.repeats, chosen[1].repeats)
        if p >= TIE_ALPHA:
            tied = ((chosen[1], p),)
    over_exact = (exact_seconds / best.seconds
                  if exact_seconds and math.isfinite(best.seconds) and best.seconds > 0
                  else None)
    over = {p.solver: p.seconds / best.seconds for p in chosen[1:]
            if math.isfinite(p.seconds) and best.seconds > 0}
    return FrontierPick(recommended=best, tied_with=tied, no_safe=no_safe,
                        exact_seconds=_finite_or_none(exact_seconds), exact=exact,
                        speedup_over_exact=_finite_or_none(over_exact),
                        speedup_over_solvers=over, timing_repeats=timing_repeats,
                        statement=_statement(best, tied, no_safe, over_exact, over, exact))


def _setting(pick: SolverPick) -> str:
    value = pick.value
    if pick.knob_name == "tol":
        return f"{pick.solver} at tol {value:g}"
    return f"{pick.solver} at {pick.knob_name} = {value:g}"


def _statement(best: SolverPick, tied: Sequence[tuple[SolverPick, float]],
               no_safe: Sequence[SolverPick], over_exact: float | None,
               over: Mapping[str, float], exact: str) -> str:
    parts = [f"recommended: {_setting(best)}, {best.seconds:.3g} s per fit evaluation"]
    for pick, p in tied:
        parts.append(f"not distinguishable from {_setting(pick)} ({pick.seconds:.3g} s; "
                     f"Mann-Whitney p = {p:.2g} >= {TIE_ALPHA:g}), so both are named")
    if over_exact is not None and math.isfinite(over_exact):
        parts.append(f"{over_exact:.3g}x faster than {exact}")
    if over:
        parts.append("median time of the other solvers' picks over this one: "
                     + ", ".join(f"{name} {ratio:.3g}x" for name, ratio in over.items()))
    parts += [f"{pick.solver} has no safe setting: {pick.reason}" for pick in no_safe]
    return "; ".join(parts)
