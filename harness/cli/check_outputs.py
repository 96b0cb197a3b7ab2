"""Where ``covaudit check`` writes: ``check.json`` and ``check.html`` (and a caller's extra
files) moved into ``--out`` together only when all were written, and the default folder
named after the data file."""

from __future__ import annotations

import os
import shutil
import tempfile
from pathlib import Path

import numpy as np

from harness.check.check_records import CheckResult
from harness.model.json_values import json_text as strict_json
from harness.report.check_report import render_check_report


def json_text(result: CheckResult) -> str:
    """The JSON output (non-finite numbers as null)."""
    return strict_json(result)


def write_outputs(result: CheckResult, out: str | Path, *, html_name: str = "check.html",
                  json_name: str = "check.json", extra: dict[str, str] | None = None,
                  points: np.ndarray | None = None, holdout: np.ndarray | None = None,
                  coord_units: str | None = None) -> Path:
    """Write the JSON, the HTML report and ``extra`` files (name -> text) into ``out``
    atomically: everything goes to a temporary folder first and is renamed at the end."""
    out = Path(out)
    out.parent.mkdir(parents=True, exist_ok=True)
    tmp = Path(tempfile.mkdtemp(prefix=f".{out.name}-", dir=out.parent))
    try:
        (tmp / json_name).write_text(json_text(result), encoding="utf-8")
        for name, text in (extra or {}).items():
            (tmp / name).parent.mkdir(parents=True, exist_ok=True)
            (tmp / name).write_text(text, encoding="utf-8")
        (tmp / html_name).write_text(render_check_report(result, points=points,
                                                         holdout=holdout,
                                                         coord_units=coord_units),
                                     encoding="utf-8")
        out.mkdir(exist_ok=True)
        for item in sorted(tmp.rglob("*")):
            if item.is_file():
                target = out / item.relative_to(tmp)
                target.parent.mkdir(parents=True, exist_ok=True)
                os.replace(item, target)
    finally:
        shutil.rmtree(tmp, ignore_errors=True)
    return out


def default_out(datafile: str | Path) -> Path:
    """``reports/check-<data file stem>``: one folder per data file, so checks of different
    files do not overwrite each other."""
    return Path("reports") / f"check-{Path(datafile).stem}"


def written_files(out: str | Path, names: list[str]) -> list[Path]:
    """The files ``write_outputs`` wrote into ``out``, in order."""
    return [Path(out) / name for name in names if (Path(out) / name).is_file()]
