"""The type checker runs clean on the package (settings in pyproject.toml, ``[tool.mypy]``)."""

import shutil
import subprocess
import sys
from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parent.parent


def test_mypy_reports_no_errors_on_harness(tmp_path):
    if shutil.which("mypy") is None and not _module_available("mypy"):
        pytest.fail("mypy is a test dependency (pip install -e '.[test]'); it is not installed")
    proc = subprocess.run(
        [sys.executable, "-m", "mypy", "--cache-dir", str(tmp_path / "mypy-cache")],
        cwd=REPO, capture_output=True, text=True, timeout=600)
    assert proc.returncode == 0, proc.stdout[-4000:] + proc.stderr[-2000:]
    assert "Success: no issues found" in proc.stdout


def _module_available(name: str) -> bool:
    import importlib.util

    return importlib.util.find_spec(name) is not None
