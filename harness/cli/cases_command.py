"""``covaudit cases CASEFILE``: list a grid's tasks and their estimated cost, run nothing."""

from __future__ import annotations

import argparse
import json
import sys
from typing import Any

from harness.infra.exit_codes import ExitCode


def add_parser(subparsers: Any) -> argparse.ArgumentParser:
    parser = subparsers.add_parser(
        "cases", help="list the tasks of a case grid with estimated costs",
        description="Validate a case file and list its expanded tasks (key, label, estimated "
                    "time and memory, reference) without running them. Exit 2 on a bad file.")
    parser.add_argument("casefile", metavar="CASEFILE", help="case grid (TOML)")
    parser.add_argument("--only", metavar="KEY-PATTERN", action="append", default=None,
                        help="list only tasks whose key or label matches (repeatable)")
    parser.add_argument("--json", action="store_true", help="print JSON instead of a table")
    parser.add_argument("--no-probe", action="store_true",
                        help="do not time the 0.25 s dense probe nor read the load that "
                             "calibrate the estimates to this machine (assume 7 Gflop/s, "
                             "idle)")
    return parser


def run(args: argparse.Namespace) -> int:
    from harness.grid.cases import CaseFileError, format_bytes, load_case
    from harness.grid.cases.cost import contention, estimate_grid
    from harness.grid.runner import select_tasks
    from harness.linalg.dense_budget import default_memory_budget
    from harness.linalg.dense_rate import measure_dense_rate

    try:
        case = load_case(args.casefile)
    except CaseFileError as exc:
        print(f"covaudit cases: {exc}", file=sys.stderr)
        return ExitCode.ERROR
    tasks = select_tasks(case.tasks(), args.only)
    budget = case.memory_budget or default_memory_budget()
    rate = None if args.no_probe else measure_dense_rate(rng=0)
    operator_rate = None
    uses_operator = [t for t in tasks if "operator" in t.references]
    if uses_operator and not args.no_probe:
        from harness.model.kernels import make_kernel
        from harness.references.operator import measure_product_cost

        first = uses_operator[0]
        operator_rate = measure_product_cost(
            make_kernel(first.kernel, dict(first.kernel_params)), dimension=first.d, rng=0)
    grid = estimate_grid(tasks, dense_limit_bytes=budget, rate=rate,
                         load_factor=1.0 if args.no_probe else contention(),
                         operator_rate=operator_rate)
    rows: list[dict[str, Any]] = [{"key": task.key, "label": task.label, **cost.to_dict()}
            for task, cost in zip(tasks, grid.tasks, strict=True)]
    if args.json:
        print(json.dumps({"case": case.name, "tasks": rows, "estimate": grid.to_dict()},
                         indent=1))
        return ExitCode.OK
    width = max([len(r["label"]) for r in rows] + [5])
    print(f"{case.name}: {len(rows)} tasks ({case.source})")
    print(f"{'key':16}  {'label':{width}}  {'est. time':>10}  {'est. memory':>11}  reference")
    for r in rows:
        ref = ("dense" if r["dense_reference"] else "operator" if r["operator_reference"]
               else "structured/ladder")
        print(f"{r['key']:16}  {r['label']:{width}}  {r['estimated_seconds']:>9.3g}s  "
              f"{format_bytes(r['estimated_bytes']):>11}  {ref}")
    basis = (f"calibrated by a dense probe at {grid.rate / 1e9:.3g} Gflop/s on one thread"
             f" and the machine's load (x{grid.contention:.2g})"
             if grid.measured else f"assuming {grid.rate / 1e9:.3g} Gflop/s on an idle "
             "machine (--no-probe)")
    print(f"estimated total: {grid.total_seconds:.3g} s serial, start-up (compilation) "
          f"{grid.startup_seconds:.2g} s included; {basis}. An estimate: on a loaded "
          "machine expect up to twice as long (see harness.grid.cases.cost)")
    return ExitCode.OK
