"""Slow benchmark: ``check`` on fields' CO2 data (26,633 satellite soundings, lon/lat) at
fixed parameters with the dense reference; prints the time and peak memory.

Run: ``python benchmarks/co2_check.py [--params variance=..]``. Needs about 12 GiB for
the dense factor and its inverse-free score pieces; refuses (exit 2) when the budget is
short. The data come from Debian's r-cran-fields, fetched by ``tests/opendata.py``.
"""

from __future__ import annotations

import argparse
import resource
import sys
import time
import warnings
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests"))

from opendata import fetch_rda  # noqa: E402

from harness.check import CheckOptions, run_check, validate  # noqa: E402
from harness.check.datafile import observations_from_arrays  # noqa: E402
from harness.cli.check_command import summary  # noqa: E402
from harness.cli.params import parse_params  # noqa: E402


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("--params", nargs="+",
                        default=["variance=4", "lengthscale=800", "nugget=0.5"],
                        help="fixed parameters (chordal km)")
    parser.add_argument("--kernel", default="matern32")
    parser.add_argument("--tolerances", default="1e-4,1e-6,1e-8")
    args = parser.parse_args()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        co2 = fetch_rda("fields", "CO2")["CO2"]
    obs = observations_from_arrays(co2["lon.lat"], co2["y"], source="fields CO2")
    data = validate(obs, coord_system="lonlat", average_duplicates=True)
    options = CheckOptions(kernel=args.kernel, fixed_params=parse_params(args.params),
                           tolerances=tuple(float(t) for t in args.tolerances.split(",")),
                           holdout=0.02, refit=False, dense_fit_max_n=0)
    start = time.perf_counter()
    result = run_check(data, options, source="fields CO2",
                       progress=lambda m: print(f"  .. {m}", file=sys.stderr))
    seconds = time.perf_counter() - start
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 2**20
    print(summary(result))
    print(f"  CO2: n = {result.n:,}, reference {result.reference}, {seconds:.0f} s, "
          f"peak resident memory {peak:.2f} GiB")
    return 0


if __name__ == "__main__":
    sys.exit(main())
