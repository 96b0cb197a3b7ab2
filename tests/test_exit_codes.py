"""The one exit-code table (``harness/infra/exit_codes.py``; DEVELOPERS.md "Exit codes")."""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

from harness.infra.exit_codes import PRECEDENCE, ExitCode, combine

CLI = Path(__file__).resolve().parents[1] / "harness" / "cli"


def test_table_values() -> None:
    assert {code.name: int(code) for code in ExitCode} == {
        "OK": 0, "FINDING": 1, "ERROR": 2, "SOLVER_FAILED": 3, "INTERRUPTED": 130}


@pytest.mark.parametrize(("outcomes", "expected"), [
    ([], ExitCode.OK),
    ([0, 0], ExitCode.OK),
    ([0, 1], ExitCode.FINDING),
    ([1, 3], ExitCode.SOLVER_FAILED),
    ([3, 2, 1], ExitCode.ERROR),
    ([1, 2, 130, 3], ExitCode.INTERRUPTED),
    ([ExitCode.FINDING, ExitCode.OK], ExitCode.FINDING),
])
def test_combine_follows_the_precedence(outcomes: list[int], expected: ExitCode) -> None:
    assert combine(outcomes) is expected


def test_precedence_covers_the_table() -> None:
    assert [int(c) for c in PRECEDENCE] == [130, 2, 3, 1, 0]
    assert set(PRECEDENCE) == set(ExitCode)


def test_combine_refuses_codes_outside_the_table() -> None:
    with pytest.raises(ValueError):
        combine([4])


def test_cli_defines_no_exit_codes_of_its_own() -> None:
    # Exit codes are defined once: no EXIT_* names and no bare integer returned by a verb.
    offenders: list[str] = []
    for path in sorted(CLI.glob("*.py")):
        tree = ast.parse(path.read_text(encoding="utf-8"))
        for node in ast.walk(tree):
            if isinstance(node, ast.Name) and node.id.startswith("EXIT_"):
                offenders.append(f"{path.name}:{node.lineno}: {node.id}")
            if isinstance(node, ast.FunctionDef) and node.name in ("run", "main"):
                for ret in ast.walk(node):
                    if (isinstance(ret, ast.Return) and isinstance(ret.value, ast.Constant)
                            and isinstance(ret.value.value, int)):
                        offenders.append(f"{path.name}:{ret.lineno}: return {ret.value.value}")
    assert offenders == []


def test_infra_imports_no_other_harness_package() -> None:
    infra = CLI.parent / "infra"
    for path in sorted(infra.glob("*.py")):
        tree = ast.parse(path.read_text(encoding="utf-8"))
        for node in ast.walk(tree):
            names = ([a.name for a in node.names] if isinstance(node, ast.Import)
                     else [node.module or ""] if isinstance(node, ast.ImportFrom) else [])
            for name in names:
                assert not name.startswith("harness.") or name.startswith("harness.infra"), \
                    f"{path.name} imports {name}"
