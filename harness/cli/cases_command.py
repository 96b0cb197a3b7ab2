"""``covaudit cases CASEFILE``: list a grid's tasks and their estimated cost, run nothing."""

from __future__ import annotations

import argparse
import json
import sys
from typing import Any


def add_parser(subparsers: Any) -> argparse.ArgumentParser:
    parser = subparsers.add_parser(
        "cases", help="list the tasks of a case grid with estimated costs",
        description="Validate a case file and list its expanded tasks (key, label, estimated "
                    "time and memory, reference) without running them. Exit 2 on a bad file.")
    parser.add_argument("casefile", metavar="CASEFILE", help="case grid (TOML)")
    parser.add_argument("--only", metavar="KEY-PATTERN", action="append", default=None,
                        help="list only tasks whose key or label matches (repeatable)")
    parser.add_argument("--json", action="store_true", help="print JSON instead of a table")
    return parser


def run(args: argparse.Namespace) -> int:
    from harness.grid.cases import CaseFileError, format_bytes, load_case
    from harness.grid.cases.cost import estimate_cost
    from harness.grid.runner import select_tasks
    from harness.references.budget import default_memory_budget

    try:
        case = load_case(args.casefile)
    except CaseFileError as exc:
        print(f"covaudit cases: {exc}", file=sys.stderr)
        return 2
    tasks = select_tasks(case.tasks(), args.only)
    budget = case.memory_budget or default_memory_budget()
    rows = []
    for task in tasks:
        cost = estimate_cost(task, dense_limit_bytes=budget)
        rows.append({"key": task.key, "label": task.label, **cost.to_dict()})
    if args.json:
        print(json.dumps({"case": case.name, "tasks": rows}, indent=1))
        return 0
    width = max([len(r["label"]) for r in rows] + [5])
    print(f"{case.name}: {len(rows)} tasks ({case.source})")
    print(f"{'key':16}  {'label':{width}}  {'est. time':>10}  {'est. memory':>11}  reference")
    for r in rows:
        ref = "dense" if r["dense_reference"] else "structured/ladder"
        print(f"{r['key']:16}  {r['label']:{width}}  {r['estimated_seconds']:>9.3g}s  "
              f"{format_bytes(r['estimated_bytes']):>11}  {ref}")
    total = sum(r["estimated_seconds"] for r in rows)
    print(f"estimated total: {total:.3g} s serial (rough model, see harness.grid.cases.cost)")
    return 0
