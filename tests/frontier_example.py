"""A hand-made check of several solvers for the frontier report's tests (no fit is run;
nothing here is measured, every number is invented).

Solvers, in the order listed:

* ``hodlr``, knob ``tol`` 1e-2, 1e-4, 1e-6, 1e-8: unsafe, unresolved, safe, safe; the
  pick is 1e-6 at 0.12 s;
* ``vecchia``, knob ``neighbours`` 10, 20, 40, 80: unsafe, unsafe, safe, safe; at 40 the
  log-likelihood error is exactly 0 and the kriging error is missing (null); 40 is tied
  with the pick (p = 0.41);
* ``PLUGIN`` (a long module path, to stress the table's width), knob ``rank`` 50, 200:
  50 failed (no metrics, no time), 200 is unsafe; no safe setting;
* ``REFUSED`` (``other.mod:factory``): refused before any point.

The exact (dense) log-likelihood takes 0.97 s; every point's time has 5 repeats.
"""

from __future__ import annotations

import dataclasses
from typing import Any

from check_example import example_result

from harness.check.check_records import CheckResult, MetricValue, ToleranceResult

PLUGIN = "mypackage.compressed_solvers:make_block_low_rank_solver"
REFUSED = "other.mod:factory"
PLUGIN_FAILURE = ("raised ValueError: the factorization at rank 50 lost positive "
                  "definiteness in block 3 of 12; try a larger rank")
REFUSAL = "option --solver other.mod:factory: no module named other.mod"
NO_SAFE_REASON = "rank 200 is unsafe (log-likelihood error 0.5 nats) and rank 50 failed"
LIMITS = {"loglik_error": 0.1, "param_shift_se": 0.1, "kriging_mean_sd": 0.05}
EXACT_SECONDS = 0.97
REPEATS = 5


def _point(knob: str, value: float, *, status: str, errors: tuple[Any, Any, Any],
           seconds: float | None, nondominated: bool, error: str = "",
           peak_bytes: int | None = 50_000_000) -> dict[str, Any]:
    metrics = tuple(MetricValue(name, float("nan") if v is None else v, LIMITS[name],
                                None if v is None else abs(v) / 20)
                    for name, v in zip(LIMITS, errors, strict=True)) if not error else ()
    row = ToleranceResult(
        tol=value if knob == "tol" else None, safe=status == "safe", reference="dense",
        metrics=metrics, seconds=seconds if seconds is not None else float("nan"),
        speedup=EXACT_SECONDS / seconds if seconds else None, nbytes=1000, error=error,
        status=status, knob_name=knob, knob_value=value)
    repeats = [] if seconds is None else [seconds * f for f in (0.96, 0.99, 1.0, 1.02, 1.1)]
    return row.to_dict() | {
        "time": {"seconds": seconds, "repeats": repeats,
                 "first_call_seconds": None if seconds is None else seconds * 4.2,
                 "peak_bytes": None if seconds is None else peak_bytes},
        "nondominated": nondominated}


def _solver(given: str, name: str, knob: str, more_accurate: str,
            points: list[dict[str, Any]], *, status: str = "audited",
            problem: str | None = None, pick: float | None = None,
            reason: str | None = None) -> dict[str, Any]:
    seconds = next((p["time"]["seconds"] for p in points if p["knob_value"] == pick), None)
    return {"given": given, "solver": {"name": name, "version": "0.1.0"},
            "knob": {"name": knob, "range": "(0, inf)", "more_accurate": more_accurate,
                     "values": [p["knob_value"] for p in points]},
            "status": status, "problem": problem, "points": points,
            "pick": None if pick is None else {"value": pick, "seconds": seconds},
            "reason": reason}


def example_solvers() -> tuple[dict[str, Any], ...]:
    hodlr = _solver("hodlr", "hodlr", "tol", "smaller", [
        _point("tol", 1e-2, status="unsafe", errors=(2.6, 0.06, 0.017), seconds=0.05,
               nondominated=True),
        _point("tol", 1e-4, status="unresolved", errors=(0.02, 0.09, 0.005),
               seconds=0.09, nondominated=True),
        _point("tol", 1e-6, status="safe", errors=(1e-5, 2e-5, 3e-5), seconds=0.12,
               nondominated=True),
        _point("tol", 1e-8, status="safe", errors=(1e-9, 2e-9, 3e-9), seconds=0.2,
               nondominated=True)], pick=1e-6)
    vecchia = _solver("vecchia", "vecchia", "neighbours", "larger", [
        _point("neighbours", 10, status="unsafe", errors=(-0.8, 0.3, 0.2), seconds=0.02,
               nondominated=True),
        _point("neighbours", 20, status="unsafe", errors=(-0.05, 0.2, 0.03),
               seconds=0.04, nondominated=True),
        _point("neighbours", 40, status="safe", errors=(0.0, 0.01, None), seconds=0.13,
               nondominated=False),
        _point("neighbours", 80, status="safe", errors=(1e-4, 0.002, 0.004),
               seconds=0.3, nondominated=False)], pick=40)
    plugin = _solver(PLUGIN, "mypkg", "rank", "larger", [
        _point("rank", 50, status="unsafe", errors=(None, None, None), seconds=None,
               nondominated=False, error=PLUGIN_FAILURE),
        _point("rank", 200, status="unsafe", errors=(0.5, 0.3, 0.1), seconds=0.5,
               nondominated=False)],
        status="solver failed", problem="raised ValueError at rank 50",
        reason=NO_SAFE_REASON)
    refused = _solver(REFUSED, "other", "tol", "smaller", [], status="refused",
                      problem=REFUSAL, reason=REFUSAL)
    return hodlr, vecchia, plugin, refused


def example_frontier(solvers: tuple[dict[str, Any], ...]) -> dict[str, Any]:
    listed = {s["given"] for s in solvers}
    return {
        "recommended": {"solver": "hodlr", "knob_name": "tol", "value": 1e-6,
                        "seconds": 0.12},
        "tied_with": [{"solver": "vecchia", "knob_name": "neighbours", "value": 40,
                       "seconds": 0.13, "p_value": 0.41}] if "vecchia" in listed else [],
        "exact_seconds": EXACT_SECONDS, "exact": "dense",
        "speedup_over_exact": EXACT_SECONDS / 0.12,
        "speedup_over_solvers": {"vecchia": 0.13 / 0.12} if "vecchia" in listed else {},
        "no_safe": [{"solver": s["given"], "reason": s["reason"]} for s in solvers
                    if s["pick"] is None],
        "timing_repeats": REPEATS,
        "statement": "hodlr at tol 1e-6 is the fastest safe setting (0.12 s, 8.1x faster "
                     "than the dense computation); vecchia at neighbours 40 is as fast "
                     "within the timing noise.",
    }


def frontier_result(*, solvers: tuple[str, ...] = ("hodlr", "vecchia", PLUGIN, REFUSED)
                    ) -> CheckResult:
    """``check_example.example_result`` (hodlr's own rows) with the solvers named."""
    chosen = tuple(s for s in example_solvers() if s["given"] in solvers)
    return dataclasses.replace(example_result(), solvers=chosen,
                               frontier=example_frontier(chosen),
                               thresholds={"loglik_nats": 0.1, "param_shift_se": 0.1,
                                           "kriging_mean_sd": 0.05})
