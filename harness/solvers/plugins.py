"""Loading solver factories from ``package.module:factory`` specs and entry points.

A third-party solver is a callable ``factorize(points, kernel, theta, *, tol, **options)``
(``harness.solvers.protocol.SolverFactory``). It is found either by an explicit spec
``package.module:attribute`` (the attribute may be dotted, ``module:Class.create``) or by
name in the entry-point group ``covaudit.solvers`` that installed distributions declare in
their ``pyproject.toml``::

    [project.entry-points."covaudit.solvers"]
    mysolver = "mypackage.solver:factorize"
"""

from __future__ import annotations

import importlib
import importlib.metadata
from collections.abc import Callable

ENTRY_POINT_GROUP = "covaudit.solvers"


class SolverLoadError(LookupError):
    """A solver spec or name that cannot be turned into a callable factory."""


def parse_spec(spec: str) -> tuple[str, str]:
    """Split ``package.module:attribute`` into its two parts, refusing malformed specs."""
    module, sep, attribute = spec.partition(":")
    if not sep or not module.strip() or not attribute.strip() or ":" in attribute:
        raise SolverLoadError(
            f"solver spec {spec!r} is not of the form 'package.module:factory'")
    return module.strip(), attribute.strip()


def load_factory(spec: str) -> Callable[..., object]:
    """Import ``package.module`` and return its callable ``factory`` attribute.

    Raises
    ------
    SolverLoadError
        The module cannot be imported (its own import errors are quoted), the attribute
        is missing, or it is not callable; every message quotes ``spec``.
    """
    module_name, attribute = parse_spec(spec)
    try:
        module = importlib.import_module(module_name)
    except ModuleNotFoundError as exc:
        if exc.name is not None and module_name.startswith(exc.name):
            raise SolverLoadError(
                f"solver spec {spec!r}: module {module_name!r} not found (is the package "
                "installed, or its folder on PYTHONPATH?)") from exc
        raise SolverLoadError(
            f"solver spec {spec!r}: importing {module_name!r} failed because its "
            f"dependency {exc.name!r} is not installed") from exc
    except Exception as exc:  # the plugin's own import-time error, quoted
        raise SolverLoadError(
            f"solver spec {spec!r}: importing {module_name!r} raised "
            f"{type(exc).__name__}: {exc}") from exc
    target: object = module
    for part in attribute.split("."):
        if not hasattr(target, part):
            public = sorted(n for n in dir(module) if not n.startswith("_"))
            raise SolverLoadError(
                f"solver spec {spec!r}: module {module_name!r} has no attribute "
                f"{attribute!r} (public names: {', '.join(public[:20]) or 'none'})")
        target = getattr(target, part)
    if not callable(target):
        raise SolverLoadError(
            f"solver spec {spec!r}: {attribute!r} is a {type(target).__name__}, not a "
            "callable factorize(points, kernel, theta, *, tol, ...)")
    return target


def entry_point_solvers() -> dict[str, importlib.metadata.EntryPoint]:
    """Solvers declared by installed distributions in the ``covaudit.solvers`` group."""
    found: dict[str, importlib.metadata.EntryPoint] = {}
    for ep in importlib.metadata.entry_points(group=ENTRY_POINT_GROUP):
        found.setdefault(ep.name, ep)
    return found


def load_entry_point(ep: importlib.metadata.EntryPoint) -> Callable[..., object]:
    """The callable an entry point names, with the same errors as ``load_factory``."""
    spec = ep.value
    try:
        target = ep.load()
    except Exception as exc:
        raise SolverLoadError(
            f"entry point {ep.name!r} = {spec!r} in group {ENTRY_POINT_GROUP!r} could not be "
            f"loaded: {type(exc).__name__}: {exc}") from exc
    if not callable(target):
        raise SolverLoadError(
            f"entry point {ep.name!r} = {spec!r}: target is a {type(target).__name__}, not "
            "a callable factory")
    return target


def entry_point_version(ep: importlib.metadata.EntryPoint) -> tuple[str | None, str | None]:
    """(distribution name, version) declaring ``ep``, when known."""
    dist = getattr(ep, "dist", None)
    if dist is None:
        return None, None
    return dist.metadata["Name"], dist.version


def module_version(module_name: str) -> tuple[str | None, str | None]:
    """(distribution name, version) providing a top-level module, when installed."""
    top = module_name.split(".")[0]
    names = importlib.metadata.packages_distributions().get(top, [])
    for name in names:
        try:
            return name, importlib.metadata.version(name)
        except importlib.metadata.PackageNotFoundError:
            continue
    module = importlib.import_module(top)
    version = getattr(module, "__version__", None)
    return None, (str(version) if version is not None else None)
