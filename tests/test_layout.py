"""The package layout shows the pipeline: stage packages only, one name per module.

The rules are the project's own (DEVELOPERS.md, Architecture and Conventions): no loose
modules at the top of ``harness/`` besides the package's entry points, and no two modules
or packages sharing a name, so a name means one concept across the tree.
"""

from collections import defaultdict
from pathlib import Path

import harness

PACKAGE = Path(harness.__file__).parent
TOP_LEVEL_MODULES = {"__init__.py", "__main__.py", "_version.py"}
STAGES = {"infra", "linalg", "model", "geometry", "references", "solvers", "likelihood", "audit",
          "grid", "analysis", "check", "report", "cli"}


def _python_files() -> list[Path]:
    return [p for p in PACKAGE.rglob("*.py") if "__pycache__" not in p.parts]


def test_top_level_holds_only_entry_points_and_stage_packages():
    loose = {p.name for p in PACKAGE.glob("*.py")} - TOP_LEVEL_MODULES
    assert not loose, f"loose modules at the top of harness/: {sorted(loose)}"
    packages = {p.name for p in PACKAGE.iterdir()
                if p.is_dir() and (p / "__init__.py").exists()}
    assert packages == STAGES


def test_no_two_modules_or_packages_share_a_name():
    seen: dict[str, list[str]] = defaultdict(list)
    for path in _python_files():
        if path.name == "__init__.py":
            name = path.parent.name
        else:
            name = path.stem
        seen[name].append(str(path.relative_to(PACKAGE)))
    seen.pop("harness", None)
    shared = {name: places for name, places in seen.items() if len(places) > 1}
    assert not shared, f"names used more than once: {shared}"


def test_the_version_has_one_source():
    from importlib.metadata import version

    assert harness.__version__ == version("covaudit")
    defining = {p.name for p in _python_files()
                if any(line.strip().startswith(("__version__ =", "__version__: str ="))
                       for line in p.read_text(encoding="utf-8").splitlines())}
    assert defining == {"_version.py"}


def test_references_never_import_the_solvers_they_judge():
    # DEVELOPERS.md, Architecture: a shared bug would hide itself. Only the protocol (a type) may be
    # imported; a solver reaches a reference as a preconditioner argument.
    import ast

    offenders = []
    for path in (PACKAGE / "references").rglob("*.py"):
        for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
            names = ([node.module or ""] if isinstance(node, ast.ImportFrom)
                     else [a.name for a in node.names] if isinstance(node, ast.Import) else [])
            for name in names:
                if name.startswith("harness.solvers") and name != "harness.solvers.protocol":
                    offenders.append(f"{path.relative_to(PACKAGE)}: {name}")
    assert not offenders, offenders
