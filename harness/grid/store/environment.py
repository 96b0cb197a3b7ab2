"""What a run was measured on: versions, CPU, BLAS and threads, git commit."""

from __future__ import annotations

import os
import platform
import subprocess
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


def git_commit(path: str | Path) -> str | None:
    """The commit of the git checkout holding ``path`` (None outside one or without git)."""
    try:
        result = subprocess.run(["git", "-C", str(path), "rev-parse", "HEAD"],
                                capture_output=True, text=True, timeout=5, check=False)
    except (OSError, subprocess.SubprocessError):
        return None
    return result.stdout.strip() or None if result.returncode == 0 else None


def environment(case_file: str | Path | None = None) -> dict[str, Any]:
    """Versions, CPU, BLAS pools and threads here, and the git commits of the package
    and of the case file's directory."""
    from harness.audit.timing import thread_settings

    package_dir = Path(__file__).resolve().parents[2]
    return {"versions": library_versions(), "cpu": cpu_description(),
            "threads": thread_settings(), "git_commit": git_commit(package_dir),
            "case_git_commit": git_commit(Path(case_file).resolve().parent)
            if case_file else None}
