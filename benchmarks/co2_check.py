"""Slow benchmark: the plain user command ``covaudit check`` on open data, with defaults.

The data are the CO2 example of the fields R package (26,633 satellite soundings of the
column CO2 concentration, longitude/latitude in degrees), read from Debian's
r-cran-fields by ``tests/opendata.py`` and written to a CSV outside the repository. The
script then runs, as a user would,

    covaudit check co2.csv --coords lon,lat --value co2_ppm --coord-system lonlat

in a child process with the machine's default BLAS threads, and records the exit code,
the wall time (also in units of the same-run dpotrf at n = 8,192), the peak resident
memory (of the largest process, and of the whole process tree sampled every 0.5 s), the
reference, the fit's convergence, each tolerance's verdict and the recommendation.

With ``--solver NAME`` (repeatable) the command lists those solvers, each with its default
sweep (``check --solver hodlr --solver vecchia``: the frontier across solver families), and
the results file also holds the frontier table (every solver's points with their verdict,
time and errors), the pick across solvers and its statement.

Each run starts with empty output and state folders; ``--resume`` keeps the state folder,
so the check reuses the fit and the audits an interrupted or failed run saved (the results
then say ``resumed`` and time this run alone).

Run: ``python benchmarks/co2_check.py --json benchmarks/results/co2_check.json``, or
``python benchmarks/co2_check.py --solver hodlr --solver vecchia
--json benchmarks/results/co2_frontier.json``
"""

from __future__ import annotations

import argparse
import json
import resource
import shutil
import subprocess
import sys
import threading
import time
import warnings
from pathlib import Path

import pandas as pd
import psutil
from machine_unit import machine, measure_unit, write_run

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests"))

from opendata import cache_dir, fetch_rda  # noqa: E402

from harness.check.check_state import state_folder  # noqa: E402

COMMAND = ["check", "co2.csv", "--coords", "lon,lat", "--value", "co2_ppm",
           "--coord-system", "lonlat"]


def write_data(folder: Path) -> Path:
    """The CO2 data as the CSV a user would have: lon, lat, co2_ppm."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        co2 = fetch_rda("fields", "CO2")["CO2"]
    lonlat = pd.DataFrame(co2["lon.lat"]).to_numpy(dtype=float)
    frame = pd.DataFrame({"lon": lonlat[:, 0], "lat": lonlat[:, 1],
                          "co2_ppm": pd.Series(co2["y"]).to_numpy(dtype=float)})
    folder.mkdir(parents=True, exist_ok=True)
    path = folder / "co2.csv"
    frame.to_csv(path, index=False)
    return path


class TreeMemory:
    """The peak of the summed resident memory of a process and its descendants."""

    def __init__(self, pid: int, *, every: float = 0.5) -> None:
        self.peak = 0
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._watch, args=(pid, every), daemon=True)
        self._thread.start()

    def _watch(self, pid: int, every: float) -> None:
        try:
            root = psutil.Process(pid)
        except psutil.NoSuchProcess:
            return
        while not self._stop.is_set():
            try:
                procs = [root, *root.children(recursive=True)]
                total = 0
                for p in procs:
                    try:
                        total += p.memory_info().rss
                    except psutil.Error:
                        pass
                self.peak = max(self.peak, total)
            except psutil.Error:
                return
            self._stop.wait(every)

    def stop(self) -> int:
        self._stop.set()
        self._thread.join(timeout=5)
        return self.peak


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__,
                                     formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--json", default="benchmarks/results/co2_check.json")
    parser.add_argument("--unit-repeats", type=int, default=3)
    parser.add_argument("--solver", action="append", default=[],
                        help="repeatable: the solvers of the check (default: its default)")
    parser.add_argument("--resume", action="store_true",
                        help="keep the saved stages of an earlier run of the same command "
                             "(the check reuses them and says so; the results then record "
                             "resumed = true and this run's time only)")
    args = parser.parse_args(argv)
    command = [*COMMAND, *(part for name in args.solver for part in ("--solver", name))]
    info = machine()
    unit = measure_unit(args.unit_repeats)
    print(f"unit: {unit['seconds']:.2f} s", flush=True)
    work = cache_dir() / "co2-check"
    data = write_data(work)
    out = work / "out"
    # A measured check starts from nothing: no earlier output and no saved stages to
    # resume, unless --resume asks to finish an interrupted or failed run.
    shutil.rmtree(out, ignore_errors=True)
    if not args.resume:
        shutil.rmtree(state_folder(out), ignore_errors=True)
    argv_run = [sys.executable, "-m", "harness", *command, "--out", str(out)]
    start = time.perf_counter()
    proc = subprocess.Popen(argv_run, cwd=data.parent, stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True)
    memory = TreeMemory(proc.pid)
    stdout, stderr = proc.communicate()
    seconds = time.perf_counter() - start
    tree_peak = memory.stop()
    largest = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss * 1024
    print(stdout)
    print(stderr[-3000:], file=sys.stderr)
    result: dict = {"command": "covaudit " + " ".join(command), "resumed": args.resume,
                    "exit_code": proc.returncode,
                    "seconds": seconds, "units": seconds / unit["seconds"],
                    "peak_rss_largest_process_gib": largest / 2**30,
                    "peak_rss_process_tree_gib": tree_peak / 2**30,
                    "stderr_tail": [line.replace(str(work), "<cache>/co2-check")
                                    for line in stderr.strip().splitlines()[-12:]]}
    report = out / "check.json"
    if report.is_file():
        check = json.loads(report.read_text())
        result.update({
            "n": check.get("n"), "reference": check.get("reference"),
            "fit_converged": check.get("fit_converged"),
            "fit_plan": (check.get("fit") or {}).get("plan"),
            "recommended_tolerance": check.get("recommended_tolerance"),
            "speedup": check.get("speedup"),
            "verdicts": {repr(t["tol"]): t.get("status") for t in check.get("tolerances", [])},
            "warnings": check.get("warnings"),
            "frontier": check.get("frontier"),
            "frontier_table": [
                {"solver": entry["given"], "status": entry["status"],
                 "problem": entry.get("problem"),
                 "points": [{"knob_name": p["knob_name"], "knob_value": p["knob_value"],
                             "status": p["status"], "seconds": p["time"]["seconds"],
                             "peak_bytes": p["time"]["peak_bytes"],
                             "loglik_error": (p.get("loglik_error") or {}).get("value"),
                             "nondominated": p["nondominated"]}
                            for p in entry["points"]]}
                for entry in check.get("solvers", [])],
        })
    write_run(args.json, "co2_check", argv, info, unit=unit, result=result)
    return 0


if __name__ == "__main__":
    sys.exit(main())
