"""What a run was measured on: versions, CPU, BLAS and threads, git commit."""

from __future__ import annotations

import subprocess
from pathlib import Path
from typing import Any

from harness.infra.machine import cpu_description, library_versions


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
