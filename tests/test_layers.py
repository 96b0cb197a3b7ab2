"""The layer order of DEVELOPERS.md, Architecture, as contracts that a test checks.

The contracts live in ``pyproject.toml`` (``[tool.importlinter]``) and are checked by
import-linter, whose import graph (grimp) holds every import of a module: at module level,
inside functions and methods, and under ``if TYPE_CHECKING:``. Three contracts:

- ``layers``: every stage package imports only the layers below it, and the siblings on
  one layer (model | geometry, references | likelihood, check | grid) not each other;
- ``references-never-import-solvers``: the references import nothing of the solvers but
  the ``Factorization`` protocol, a type (a preconditioner is passed in by the caller);
- ``no-loops``: no import cycle among the modules of any package of ``harness``.

No import is exempted from a contract unless it is listed below: ``TYPE_CHECKING_EXEMPT``
(imports needed only for annotations; none today) and the references' import of the
solver protocol.
"""

from __future__ import annotations

import ast
import logging
import tomllib
from pathlib import Path

import grimp
import pytest
from importlinter import configuration
from importlinter.application.use_cases import lint_imports

ROOT = Path(__file__).resolve().parents[1]
PYPROJECT = ROOT / "pyproject.toml"
PACKAGE = ROOT / "harness"

#: ``if TYPE_CHECKING:`` imports exempted from a contract (importer -> imported). None today.
TYPE_CHECKING_EXEMPT: frozenset[str] = frozenset()

#: Known loops in modules of the unified audit engine (issue 21, item 1), which its owner
#: removes. Delete each entry here and in ``pyproject.toml`` when its import is gone
#: (import-linter then fails on an exemption that matches nothing).


def _contracts() -> list[dict[str, object]]:
    config = tomllib.loads(PYPROJECT.read_text(encoding="utf-8"))
    return list(config["tool"]["importlinter"]["contracts"])


def test_the_contracts_hold(capsys: pytest.CaptureFixture[str]) -> None:
    # The use case, not ``importlinter.cli.lint_imports``: the command line configures
    # logging with ``dictConfig``, which disables every logger that exists already (the
    # harness's own included) for the rest of the test session.
    configuration.configure()
    kept = lint_imports(config_filename=str(PYPROJECT), cache_dir=None, no_logo=True)
    report = capsys.readouterr().out
    assert kept, report
    assert not logging.getLogger("harness.grid.store.run_lock").disabled


def test_only_listed_imports_are_exempted() -> None:
    ignored = {str(line) for contract in _contracts()
               for line in contract.get("ignore_imports", [])}  # type: ignore[attr-defined]
    protocol = {"harness.references.** -> harness.solvers.protocol"}
    assert ignored == TYPE_CHECKING_EXEMPT | protocol


def test_the_layers_name_every_stage_package() -> None:
    layers = next(c for c in _contracts() if c["id"] == "layers")["layers"]
    named = {name.strip() for layer in layers for name in str(layer).split("|")}  # type: ignore[attr-defined]
    stages = {f"harness.{p.name}" for p in PACKAGE.iterdir() if (p / "__init__.py").exists()}
    assert named == stages


def _imported_modules(node: ast.Import | ast.ImportFrom) -> list[str]:
    if isinstance(node, ast.Import):
        return [alias.name for alias in node.names]
    base = node.module or ""
    return [f"{base}.{alias.name}" for alias in node.names] + [base]


def _nested_imports(tree: ast.Module) -> set[int]:
    """Line numbers of the imports inside a function or under ``if TYPE_CHECKING:``."""
    lines = set()
    for node in ast.walk(tree):
        inside_function = isinstance(node, ast.FunctionDef | ast.AsyncFunctionDef)
        type_checking = (isinstance(node, ast.If)
                         and "TYPE_CHECKING" in ast.unparse(node.test))
        if inside_function or type_checking:
            lines |= {sub.lineno for sub in ast.walk(node)
                      if isinstance(sub, ast.Import | ast.ImportFrom)}
    return lines


def test_the_graph_holds_function_level_and_type_checking_imports() -> None:
    # The contracts are only as good as the graph: every harness import must be an edge of
    # it, the ones written inside a function or under ``if TYPE_CHECKING:`` included.
    graph = grimp.build_graph("harness", cache_dir=None)
    missing, nested = [], 0
    for path in sorted(PACKAGE.rglob("*.py")):
        module = ".".join(path.relative_to(ROOT).with_suffix("").parts).removesuffix(".__init__")
        tree = ast.parse(path.read_text(encoding="utf-8"))
        inner = _nested_imports(tree)
        for node in ast.walk(tree):
            if not isinstance(node, ast.Import | ast.ImportFrom):
                continue
            targets = [m for m in _imported_modules(node)
                       if m.startswith("harness") and m in graph.modules and m != module]
            if not targets:
                continue
            nested += node.lineno in inner
            if not any(graph.direct_import_exists(importer=module, imported=m) for m in targets):
                missing.append(f"{module}:{node.lineno} {targets}")
    assert nested > 0
    assert missing == []
