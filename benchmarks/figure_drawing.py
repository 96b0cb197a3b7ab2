"""What drawing the check report costs: its figures with covaudit's log axes against
matplotlib's default log axes.

Every ``check`` writes ``check.html`` with its figures embedded as SVG, and matplotlib's
constrained layout measures every tick label before it draws. On a log axis matplotlib
puts minor ticks at 2 to 9 times each power of ten and writes the major labels in
mathtext; ``harness.report.style.log_scale`` keeps minor ticks at 2 and 5 times and writes
the labels in plain text. This script runs one ``check`` in this process (300 scattered
points of a smooth field plus noise, fixed parameters, hodlr and vecchia with three knob
values each, one solver seed, no refit), then renders its report ``--repeats`` times with
each kind of axis, alternating, and reports the medians beside the same-run unit of
``machine_unit`` (one dpotrf at n = 8,192).

Run from the repository root:
``python benchmarks/figure_drawing.py --json benchmarks/results/figure_drawing.json``.
"""

from __future__ import annotations

import argparse
import statistics
import sys
import time
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))

from machine_unit import machine, measure_unit, write_run  # noqa: E402

#: The report modules that import ``log_scale`` by name.
FIGURE_MODULES = ("harness.report.check_figures", "harness.report.frontier_figure",
                  "harness.report.figures", "harness.report.time_to_accuracy_figure")


def _check_result(n: int, seed: int):
    from harness.check import CheckOptions, run_check, validate
    from harness.infra.data_files import Observations

    rng = np.random.default_rng(seed)
    points = rng.uniform(0.0, 10.0, (n, 2))
    z = np.sin(points[:, 0] / 2) + np.cos(points[:, 1] / 3) + 0.3 * rng.normal(size=n)
    data = validate(Observations(points=points, values=z, coords=("e", "n"), value="z",
                                 source="synthetic", rows=np.arange(1, n + 1)))
    options = CheckOptions(fixed_params={"variance": 0.5, "lengthscale": 3.0,
                                         "nugget": 0.09},
                           solver_seeds=1, refit=False, solvers=("hodlr", "vecchia"),
                           sweeps={"hodlr": (1e-4, 1e-6, 1e-8),
                                   "vecchia": (10.0, 30.0, 60.0)})
    return run_check(data, options, source="synthetic")


def _matplotlib_default(ax, which: str) -> None:
    (ax.set_xscale if which == "x" else ax.set_yscale)("log")


@contextmanager
def _log_axes(kind: str) -> Iterator[None]:
    """Within the block, the report's log axes are ``kind``: covaudit's or matplotlib's."""
    import importlib

    if kind == "covaudit":
        yield
        return
    modules = [importlib.import_module(name) for name in FIGURE_MODULES]
    saved = [module.log_scale for module in modules]
    for module in modules:
        module.log_scale = _matplotlib_default
    try:
        yield
    finally:
        for module, original in zip(modules, saved, strict=True):
            module.log_scale = original


def _seconds(render: Callable[[], str]) -> tuple[float, int]:
    start = time.perf_counter()
    html = render()
    return time.perf_counter() - start, len(html)


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__,
                                     formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--json", default="benchmarks/results/figure_drawing.json")
    parser.add_argument("--repeats", type=int, default=5)
    parser.add_argument("--n", type=int, default=300)
    parser.add_argument("--unit-repeats", type=int, default=3)
    args = parser.parse_args(argv)
    from harness.report.check_report import render_check_report

    info = machine()
    unit = measure_unit(args.unit_repeats)
    result = _check_result(args.n, seed=3)
    kinds = ("matplotlib_default", "covaudit")
    samples: dict[str, list[float]] = {kind: [] for kind in kinds}
    sizes: dict[str, int] = {}
    for kind in kinds:  # a first render of each kind warms the font and glyph caches
        with _log_axes(kind):
            render_check_report(result)
    for _ in range(args.repeats):
        for kind in kinds:
            with _log_axes(kind):
                seconds, sizes[kind] = _seconds(lambda: render_check_report(result))
            samples[kind].append(seconds)
    medians = {kind: statistics.median(samples[kind]) for kind in kinds}
    write_run(args.json, "figure_drawing", argv, info, unit=unit, n=args.n,
              repeats=args.repeats,
              report={kind: {"median_seconds": medians[kind], "samples": samples[kind],
                             "median_units": medians[kind] / unit["seconds"],
                             "html_bytes": sizes[kind]} for kind in kinds},
              default_over_covaudit=medians["matplotlib_default"] / medians["covaudit"])
    print(f"unit {unit['seconds']:.2f} s; report with matplotlib's default log axes "
          f"{medians['matplotlib_default']:.2f} s, with covaudit's {medians['covaudit']:.2f} s"
          f" (ratio {medians['matplotlib_default'] / medians['covaudit']:.2f})")
    return 0


if __name__ == "__main__":
    sys.exit(main())
