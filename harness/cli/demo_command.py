"""``covaudit demo``: generate the fictional soil-moisture dataset and check it.

Writes ``demo-data/soil_moisture.csv`` and its data dictionary
``demo-data/soil_moisture.md``, ``demo.json`` and ``demo.html`` (truth against estimate)
into ``--out`` (default ``reports/``), atomically.
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import numpy as np

from harness.audit.rule import Thresholds
from harness.check import CheckOptions, run_check, validate
from harness.check.demo_data import DEMO_N, DEMO_SEED, TRUE_KERNEL, generate_demo
from harness.check.pipeline import holdout_indices
from harness.cli.check_outputs import write_outputs
from harness.cli.check_summary import summary
from harness.cli.flag_types import int_range
from harness.infra.data_files import observations_from_arrays
from harness.infra.exit_codes import ExitCode

DEMO_TOLERANCES = (1e-2, 1e-4, 1e-6, 1e-8, 1e-10)


def add_parser(subparsers: argparse._SubParsersAction) -> None:
    p = subparsers.add_parser(
        "demo", help="generate the demo dataset and check it",
        description="Generate a deterministic, fictional soil-moisture dataset with a known "
                    "covariance model and run covaudit check on it.")
    p.add_argument("--out", default="reports", help="output folder (default reports/)")
    p.add_argument("--n", type=int_range("--n", 10, 10**7), default=DEMO_N,
                   help=f"points (default {DEMO_N})")


def run(args: argparse.Namespace) -> int:
    from harness.cli.progress import CheckProgress, wrote_lines

    start = time.perf_counter()
    progress = CheckProgress(tolerances=len(DEMO_TOLERANCES), refit=True)
    progress(f"generating {args.n:,} demo points (seed {DEMO_SEED})")
    demo = generate_demo(n=args.n)
    frame = demo.frame
    obs = observations_from_arrays(frame[["easting_m", "northing_m"]].to_numpy(),
                                   frame["vwc"].to_numpy(),
                                   source="demo-data/soil_moisture.csv")
    data = validate(obs)
    options = CheckOptions(kernel=TRUE_KERNEL, anisotropic=True, mean="constant",
                           tolerances=DEMO_TOLERANCES, seed=0, thresholds=Thresholds())
    try:
        result = run_check(data, options, source="demo-data/soil_moisture.csv",
                           truth=demo.truth(), progress=progress)
        write_outputs(result, args.out, html_name="demo.html", json_name="demo.json",
                      extra={"demo-data/soil_moisture.csv": frame.to_csv(index=False),
                             "demo-data/soil_moisture.md": demo.dictionary},
                      points=data.points, coord_units="m", holdout=holdout_indices(
                          data.n, fraction=options.holdout, seed=options.seed))
    except (ValueError, MemoryError, np.linalg.LinAlgError, OSError) as exc:
        print(f"covaudit demo: error: {exc}", file=sys.stderr)
        return ExitCode.ERROR
    finally:
        progress.close()
    print(summary(result))
    print(f"  truth       {demo.truth()}")
    print(f"  finished in {time.perf_counter() - start:.0f} s")
    for line in wrote_lines([Path(args.out) / name for name in (
            "demo.html", "demo.json", "demo-data/soil_moisture.csv",
            "demo-data/soil_moisture.md")]):
        print(line)
    return ExitCode.OK
