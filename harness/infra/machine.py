"""The machine a measurement was made on: library versions and the CPU."""

from __future__ import annotations

import os
import platform
import sys
from importlib import metadata
from pathlib import Path
from typing import Any

LIBRARIES = ("covaudit", "numpy", "scipy", "numba", "pandas", "scikit-learn", "threadpoolctl",
             "dask", "distributed")


def library_versions() -> dict[str, str | None]:
    out: dict[str, str | None] = {"python": sys.version.split()[0]}
    for name in LIBRARIES:
        try:
            out[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            out[name] = None
    return out


def cpu_description() -> dict[str, Any]:
    import psutil

    model = platform.processor() or None
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                model = line.split(":", 1)[1].strip()
                break
    except OSError:
        pass
    return {"model": model, "machine": platform.machine(), "logical_cpus": os.cpu_count(),
            "physical_cpus": psutil.cpu_count(logical=False),
            "memory_bytes": int(psutil.virtual_memory().total), "system": platform.platform()}
