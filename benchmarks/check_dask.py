"""``covaudit check`` with the exact-operator reference: serial, 1 and 2 local Dask workers.

One synthetic dataset (``check_at_scale.write_data``: uniform points in the plane, a
Matern 3/2 field by random Fourier features plus noise) is checked three times with
``--reference operator`` at fixed parameters, one tolerance and one solver seed, so that
the reference dominates: in this process (the operator's own threads), with
``--dask-local 1`` and with ``--dask-local 2`` (one thread per worker). Each run's wall
seconds (the whole command, interpreter start and cluster start included) are recorded
with the same-run unit (one dpotrf at n = 8,192, ``machine_unit``), medians of
``--repeats``, and the runs' values are compared: every judged metric (log-likelihood
error, parameter shift, kriging error) must agree with the serial run's to 1e-12 relative
to max(1, |L|) (the script exits 1 otherwise). The stated SE of the log-likelihood is
recorded too; its rounding terms are measured from the products' own rounding, which
differs in the last bits between the serial and the distributed row blocks, so it is
information, not a criterion.

Run: ``python benchmarks/check_dask.py --json benchmarks/results/check_dask.json``.
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import tempfile
import time
from pathlib import Path

from check_at_scale import Scenario, write_data
from machine_unit import machine, measure_unit, median, write_run

LAYOUTS: dict[str, tuple[str, ...]] = {"serial": (), "dask-local 1": ("--dask-local", "1"),
                                       "dask-local 2": ("--dask-local", "2")}
FIXED = ("--params", "variance=1.0", "lengthscale=50", "nugget=0.01")


def one_run(work: Path, data: Path, columns: list[str], layout: tuple[str, ...],
            out: str) -> tuple[float, dict]:
    command = [sys.executable, "-m", "harness", "check", data.name, *columns, "--kernel",
               "matern32", *FIXED, "--reference", "operator", "--tolerances", "1e-8",
               "--solver-seeds", "1", "--no-refit", "--json", "--out", out, *layout]
    start = time.perf_counter()
    done = subprocess.run(command, cwd=work, capture_output=True, text=True, check=False)
    seconds = time.perf_counter() - start
    if done.returncode not in (0, 1):
        raise SystemExit(f"check failed ({done.returncode}): {done.stderr[-2000:]}")
    return seconds, json.loads(done.stdout)


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__,
                                     formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--n", type=int, default=8192)
    parser.add_argument("--repeats", type=int, default=3)
    parser.add_argument("--unit-repeats", type=int, default=3)
    parser.add_argument("--json", help="results file (default: print only)")
    args = parser.parse_args(argv)
    info = machine()
    unit = measure_unit(args.unit_repeats)
    rows: dict[str, dict] = {}
    with tempfile.TemporaryDirectory(prefix="covaudit-dask-") as scratch:
        work = Path(scratch)
        data, columns = write_data(Scenario(args.n, 2, 50.0, (), 0.0, None), work, seed=3)
        values: dict[str, dict] = {}
        for repeat in range(args.repeats):
            for name, layout in LAYOUTS.items():
                seconds, result = one_run(work, data, columns, layout,
                                          f"out-{name.replace(' ', '-')}-{repeat}")
                rows.setdefault(name, {"seconds": []})["seconds"].append(seconds)
                values[name] = result
                print(f"{name}: {seconds:.1f} s", flush=True)
    serial = values["serial"]["reference_detail"]["uncertainty"]
    agree = True
    for name, row in rows.items():
        row["median_seconds"] = median(row["seconds"])
        row["units"] = row["median_seconds"] / unit["seconds"]
        got = values[name]["reference_detail"]["uncertainty"]
        row["loglik_se"] = got["loglik_se"]
        rel = abs(got["loglik_se"] - serial["loglik_se"]) / abs(serial["loglik_se"])
        errors = [abs(a[metric]["value"] - b[metric]["value"])
                  for a, b in zip(values[name]["tolerances"], values["serial"]["tolerances"],
                                  strict=True)
                  for metric in ("loglik_error", "param_shift_se", "kriging_mean_sd")]
        row["loglik_se_relative_difference"] = rel
        row["largest_metric_difference"] = max(errors)
        agree = agree and max(errors) <= 1e-12 * max(1.0, abs(values["serial"]["loglik"]))
    speedup = rows["dask-local 1"]["median_seconds"] / rows["dask-local 2"]["median_seconds"]
    result = {"n": args.n, "layouts": rows, "two_over_one_worker_speedup": speedup,
              "values_agree_1e-12": agree}
    print(json.dumps(result, indent=1))
    if args.json:
        write_run(args.json, "check_dask", argv, info, unit=unit, result=result)
    return 0 if agree else 1


if __name__ == "__main__":
    sys.exit(main())
