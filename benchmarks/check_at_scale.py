"""Slow benchmark: ``covaudit check`` beyond the dense limit, as a user runs it.

Each scenario writes a synthetic dataset (below), runs

    covaudit check DATA --coords ... --value ... --kernel matern32 [--tolerances ...]

in a child process with the machine's default BLAS threads, and records the exit code,
the wall time (also in units of the same-run dpotrf at n = 8,192, ``machine_unit``), the
peak resident memory (of the largest process, and of the whole process tree sampled every
0.5 s, ``co2_check.TreeMemory``), the reference of each metric, whether the fit
converged, each knob value's verdict, and the cost plan the check printed before it
started, against what was measured: time within 2x and peak memory within 1.5x.

Scenarios and what they must meet:

========== =========== ===================================================================
name       points      limits
========== =========== ===================================================================
line-100k  100,000     the state-space (Kalman) reference for every metric; <= 40 units
line-1m    1,048,576   <= 300 units, <= 8 GiB
plane-65k  65,536      ``--tolerances 1e-4,1e-6,1e-8``; <= 500 units, <= 8 GiB
plane-131k 131,072     ``--tolerances 1e-4,1e-6,1e-8``; <= 1,500 units, <= 12 GiB
========== =========== ===================================================================

For each: exit code 0 or 1 (a verdict, not an error), the fit converged, and the plan's
predictions within 2x (time) and 1.5x (peak memory of the process tree). A scenario that
misses a limit is recorded with ``passed: false`` and the script exits 1.

The data: points uniform on [0, 1000] (a 1,000 km transect) or [0, 1000]^2, values
10 + f(x) + 0.1 e with e standard normal and f a stationary Gaussian field with a Matern
3/2 covariance (unit variance, length scale 5 km on the line, 50 km in the plane), drawn
by 1,000 random Fourier features (Rahimi and Recht 2007, "Random features for large-scale
kernel machines", sec. 3): f(x) = sqrt(2 / F) sum_k cos(w_k . x + b_k), with b_k uniform
on [0, 2 pi) and w_k from the Matern spectral density, a multivariate Student t with
2 nu = 3 degrees of freedom and scale 1 / lengthscale (Rasmussen and Williams 2006,
"Gaussian Processes for Machine Learning", eq. 4.15): w = z sqrt(2 nu / g) / lengthscale
with z standard normal in d dimensions and g chi-squared with 2 nu degrees of freedom.

Run: ``python benchmarks/check_at_scale.py line-100k --repeats 3 --json
benchmarks/results/check_at_scale_line-100k.json`` (one scenario per call; each takes
minutes to hours). ``--repeats K`` runs the check K times from empty folders and reports
the median time (every run's time is kept under ``repeats``; the largest peak memory is
reported, the other details are the median run's). ``--plan-only`` records only the plan
the check prints before it starts (``check --plan-only``): its predicted time per stage
and resident memory, in seconds and same-run units, within a minute.
``--check-options='--preconditioner vecchia'`` adds options to the scenario's (the
results file's command says which).
"""

from __future__ import annotations

import argparse
import json
import resource
import shlex
import shutil
import statistics
import subprocess
import sys
import tempfile
import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd
from co2_check import TreeMemory
from machine_unit import machine, measure_unit, write_run

from harness.check.check_state import state_folder

#: Random Fourier features of the synthetic field.
FEATURES = 1_000
#: Blocks of features summed at once (bounds the n x block temporary).
_FEATURE_BLOCK = 50
#: The plan's time and memory predictions must be within these factors of the measured.
TIME_FACTOR = 2.0
MEMORY_FACTOR = 1.5


@dataclass(frozen=True)
class Scenario:
    """One measured check: its data, its options and its limits."""

    n: int
    d: int
    lengthscale: float
    options: tuple[str, ...]
    max_units: float
    max_gib: float | None
    statespace_everywhere: bool = False


SCENARIOS = {
    "line-100k": Scenario(100_000, 1, 5.0, (), 40.0, None, statespace_everywhere=True),
    "line-1m": Scenario(1_048_576, 1, 5.0, (), 300.0, 8.0),
    "plane-65k": Scenario(65_536, 2, 50.0, ("--tolerances", "1e-4,1e-6,1e-8"), 500.0, 8.0),
    "plane-131k": Scenario(131_072, 2, 50.0, ("--tolerances", "1e-4,1e-6,1e-8"), 1500.0,
                           12.0),
}


def matern32_field(points: np.ndarray, lengthscale: float,
                   rng: np.random.Generator) -> np.ndarray:
    """A draw of a unit-variance Matern 3/2 field at ``points`` (module docstring)."""
    n, d = points.shape
    nu = 1.5
    z = rng.standard_normal((FEATURES, d))
    g = rng.chisquare(2 * nu, size=FEATURES)
    w = z * np.sqrt(2 * nu / g)[:, None] / lengthscale
    b = rng.uniform(0.0, 2 * np.pi, FEATURES)
    field = np.zeros(n)
    for k in range(0, FEATURES, _FEATURE_BLOCK):
        field += np.cos(points @ w[k:k + _FEATURE_BLOCK].T + b[k:k + _FEATURE_BLOCK]).sum(1)
    return field * np.sqrt(2.0 / FEATURES)


def synthetic_field(n: int, d: int, lengthscale: float, rng: np.random.Generator
                    ) -> tuple[np.ndarray, np.ndarray]:
    """n points uniform on [0, 1000]^d and their values 10 + f(x) + 0.1 e (module
    docstring)."""
    points = rng.uniform(0.0, 1000.0, size=(n, d))
    values = 10.0 + matern32_field(points, lengthscale, rng) + 0.1 * rng.standard_normal(n)
    return points, values


def write_data(scenario: Scenario, folder: Path, seed: int) -> tuple[Path, list[str]]:
    """The scenario's CSV and the check's column options."""
    points, values = synthetic_field(scenario.n, scenario.d, scenario.lengthscale,
                                     np.random.default_rng(seed))
    names = ["km"] if scenario.d == 1 else ["east_km", "north_km"]
    frame = pd.DataFrame(points, columns=names)
    frame["level"] = values
    path = folder / "field.csv"
    frame.to_csv(path, index=False)
    return path, ["--coords", ",".join(names), "--value", "level", "--coord-units", "km"]


def within(predicted: float | None, measured: float, factor: float) -> bool:
    """Whether measured / predicted lies in [1 / factor, factor]; False when either is
    missing or not positive (nothing was compared, so the criterion is not met)."""
    if predicted is None or not predicted > 0 or not measured > 0:
        return False
    return 1.0 / factor <= measured / predicted <= factor


def summarize(check: dict, scenario: Scenario, *, seconds: float, units: float,
              tree_gib: float) -> dict:
    """What the check said and each limit, from its check.json."""
    plan = check.get("plan") or {}
    by_metric = check.get("reference_by_metric") or {}
    kinds = {metric: (entry or {}).get("kind") for metric, entry in by_metric.items()}
    statuses = {repr(t["tol"]) if t.get("tol") is not None else str(t.get("knob_value")):
                t.get("status") for t in check.get("tolerances", [])}
    predicted_seconds = plan.get("total_seconds")
    # The plan's prediction of the process tree's resident memory (arrays plus one
    # interpreter per process, harness.check.cost_plan), what TreeMemory measures.
    resident = plan.get("resident_bytes")
    predicted_gib = None if resident is None else resident / 2**30
    limits = {
        "units": units <= scenario.max_units,
        "memory": None if scenario.max_gib is None else tree_gib <= scenario.max_gib,
        "fit_converged": bool(check.get("fit_converged")),
        "every_value_judged": bool(statuses) and all(s is not None for s in statuses.values()),
        "plan_time_within_2x": within(predicted_seconds, seconds, TIME_FACTOR),
        "plan_memory_within_1.5x": within(predicted_gib, tree_gib, MEMORY_FACTOR),
    }
    if scenario.statespace_everywhere:
        limits["statespace_for_every_metric"] = bool(kinds) and all(
            kind == "statespace" for kind in kinds.values())
    rows = [{"knob_value": t.get("knob_value"), "status": t.get("status"),
             "reasons": t.get("reasons"),
             "metrics": {name: {key: (t.get(name) or {}).get(key)
                                for key in ("value", "uncertainty", "threshold")}
                         for name in ("loglik_error", "param_shift_se", "kriging_mean_sd")}}
            for t in check.get("tolerances", [])]
    return {"n": check.get("n"), "reference": check.get("reference"), "rows": rows,
            "reference_by_metric": kinds, "fit_converged": check.get("fit_converged"),
            "fit": {key: (check.get("fit") or {}).get(key)
                    for key in ("engine", "method", "converged", "loglik", "exact_distance")},
            "refit": {key: (check.get("refit") or {}).get(key)
                      for key in ("evaluations", "accepted_steps", "seconds", "converged")},
            "verdicts": statuses, "recommendation": check.get("recommendation"),
            "warnings": check.get("warnings"),
            "plan": {"total_seconds": predicted_seconds,
                     "total_units": plan.get("total_units"), "peak_gib": predicted_gib,
                     "peak_stage": plan.get("peak_stage"),
                     "stages": [{"stage": s.get("stage"), "seconds": s.get("seconds"),
                                 "peak_bytes": s.get("peak_bytes")}
                                for s in plan.get("stages", [])]},
            "measured_over_predicted": {
                "time": None if not predicted_seconds else seconds / predicted_seconds,
                "memory": None if not predicted_gib else tree_gib / predicted_gib},
            "limits": limits,
            "passed": all(v is not False for v in limits.values())}


def _record_plan(args: argparse.Namespace, command: list[str], work: Path, info: dict,
                 unit: dict) -> int:
    """``check --plan-only --json``: the plan alone, recorded with the same-run unit."""
    done = subprocess.run([sys.executable, "-m", "harness", *command, "--plan-only", "--json"],
                          cwd=work, capture_output=True, text=True)
    result: dict = {"scenario": args.scenario, "command": "covaudit " + " ".join(command)
                    + " --plan-only", "data_seed": args.seed, "plan_only": True,
                    "exit_code": done.returncode}
    errors = [line for line in done.stderr.splitlines() if "error:" in line]
    if done.returncode != 0:
        # A refusal (exit 2, over the memory budget) is a result: record its line.
        print(done.stderr[-3000:], file=sys.stderr)
        result["refusal"] = errors[-1] if errors else done.stderr.strip()[-500:]
        if args.json:
            write_run(args.json, "check_at_scale", None, info, unit=unit, result=result)
        return 1
    plan = json.loads(done.stdout)
    plan = plan.get("plan", plan)
    result |= {"plan": {"total_seconds": plan.get("total_seconds"),
                       "total_in_same_run_units": plan["total_seconds"] / unit["seconds"],
                       "resident_gib": plan["resident_bytes"] / 2**30,
                       "peak_stage": plan.get("peak_stage"),
                       "stages": [{"stage": s.get("stage"), "seconds": s.get("seconds"),
                                   "peak_bytes": s.get("peak_bytes"),
                                   "detail": s.get("detail")}
                                  for s in plan.get("stages", [])]}}
    print(json.dumps(result["plan"], indent=1))
    if args.json:
        write_run(args.json, "check_at_scale", None,
                  info, unit=unit, result=result)
    return 0


@dataclass(frozen=True)
class CheckRun:
    """One timed run of the check: wall seconds, the process tree's peak, its exit code,
    its standard error and its check.json (None when it wrote none)."""

    seconds: float
    tree_gib: float
    exit_code: int
    stderr: str
    check: dict | None


def _run_check(work: Path, command: list[str]) -> CheckRun:
    """The check in a child process from empty output and state folders."""
    out = work / "out"
    shutil.rmtree(out, ignore_errors=True)
    shutil.rmtree(state_folder(out), ignore_errors=True)
    start = time.perf_counter()
    proc = subprocess.Popen([sys.executable, "-m", "harness", *command], cwd=work,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    memory = TreeMemory(proc.pid)
    stdout, stderr = proc.communicate()
    seconds = time.perf_counter() - start
    tree_gib = memory.stop() / 2**30
    print(stdout)
    print(stderr[-3000:], file=sys.stderr)
    report = out / "check.json"
    check = json.loads(report.read_text()) if report.is_file() else None
    return CheckRun(seconds, tree_gib, proc.returncode, stderr, check)


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__,
                                     formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("scenario", choices=sorted(SCENARIOS))
    parser.add_argument("--json", help="results file (default: print only)")
    parser.add_argument("--unit-repeats", type=int, default=3)
    parser.add_argument("--seed", type=int, default=7, help="seed of the synthetic data")
    parser.add_argument("--keep", type=Path, help="folder for the data and the check's output "
                                                  "(default: a temporary one)")
    parser.add_argument("--repeats", type=int, default=1,
                        help="runs of the check; the median's time is reported, the "
                             "details are the median run's (default 1: the plane runs "
                             "take hours)")
    parser.add_argument("--plan-only", action="store_true",
                        help="record the check's plan (check --plan-only) without running it")
    parser.add_argument("--check-options", default="",
                        help="more options of the check, appended to the scenario's, as one "
                             "string, e.g. --check-options='--preconditioner vecchia' (the "
                             "limits stay the scenario's)")
    args = parser.parse_args(argv)
    scenario = SCENARIOS[args.scenario]
    info = machine()
    unit = measure_unit(args.unit_repeats)
    print(f"unit: {unit['seconds']:.2f} s", flush=True)
    with tempfile.TemporaryDirectory(prefix="covaudit-scale-") as scratch:
        work = args.keep or Path(scratch)
        work.mkdir(parents=True, exist_ok=True)
        data, columns = write_data(scenario, work, args.seed)
        command = ["check", data.name, *columns, "--kernel", "matern32", *scenario.options,
                   *shlex.split(args.check_options), "--out", "out"]
        if args.plan_only:
            return _record_plan(args, command, work, info, unit)
        runs = [_run_check(work, command) for _ in range(args.repeats)]
        median_seconds = statistics.median(r.seconds for r in runs)
        run = min(runs, key=lambda r: abs(r.seconds - median_seconds))
        tree_gib = max(r.tree_gib for r in runs)
        largest_gib = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss * 1024 / 2**30
        units = median_seconds / unit["seconds"]
        result: dict = {"scenario": args.scenario, "command": "covaudit " + " ".join(command),
                        "data_seed": args.seed, "exit_code": run.exit_code,
                        "seconds": median_seconds, "units": units,
                        "repeats": [{"seconds": r.seconds, "units": r.seconds / unit["seconds"],
                                     "exit_code": r.exit_code,
                                     "peak_rss_process_tree_gib": r.tree_gib} for r in runs],
                        "peak_rss_largest_process_gib": largest_gib,
                        "peak_rss_process_tree_gib": tree_gib,
                        "limits_asked": {"max_units": scenario.max_units,
                                         "max_gib": scenario.max_gib},
                        "stderr_tail": run.stderr.strip().splitlines()[-12:]}
        if run.check is not None and all(r.exit_code in (0, 1) for r in runs):
            result |= summarize(run.check, scenario, seconds=median_seconds, units=units,
                                tree_gib=tree_gib)
        else:
            result["passed"] = False
    print(json.dumps({k: result.get(k) for k in ("units", "peak_rss_process_tree_gib",
                                                  "limits", "passed")}, indent=1))
    if args.json:
        write_run(args.json, "check_at_scale", argv, info, unit=unit, result=result)
    return 0 if result["passed"] else 1


if __name__ == "__main__":
    sys.exit(main())
