"""Checking a parsed case file against its schema, collecting every problem.

``Checker`` walks the TOML document; each ``take_*`` call reads one key, checks its type
and range and records a ``CaseProblem`` (file, key path, offending value) when it is
wrong, returning a default so that checking continues. ``finish_table`` lists the keys of
a table that nothing read, each with the nearest valid name.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Iterable, Mapping, Sequence
from typing import Any

from harness.grid.cases.problems import CaseProblem, unknown_key_message
from harness.infra.option_specs import OptionSpec

_MISSING = object()


def _type_name(value: Any) -> str:
    if isinstance(value, bool):
        return "a boolean"
    if isinstance(value, int):
        return "an integer"
    if isinstance(value, float):
        return "a number"
    if isinstance(value, str):
        return "a string"
    if isinstance(value, list):
        return "an array"
    if isinstance(value, dict):
        return "a table"
    return type(value).__name__


class Checker:
    """Accumulates problems for one case file."""

    def __init__(self, file: str) -> None:
        self.file = file
        self.problems: list[CaseProblem] = []

    def problem(self, path: str, message: str) -> None:
        self.problems.append(CaseProblem(self.file, path, message))

    def spec(self, path: str, spec: OptionSpec, value: object) -> bool:
        """Record the core message of ``spec`` (``harness.infra.option_specs``) for a bad
        ``value`` at ``path``; True when the value is valid."""
        core = spec.problem(value)
        if core is not None:
            self.problem(path, core)
        return core is None

    def spec_item(self, spec: OptionSpec) -> Callable[[Any, str], Any]:
        """A ``take_items`` item check through ``spec`` (its core message on a bad item)."""
        def check(value: Any, full: str) -> Any:
            return value if self.spec(full, spec, value) else _MISSING
        return check

    # -- generic -----------------------------------------------------------------------
    def finish_table(self, table: Mapping[str, Any], path: str, valid: Iterable[str]) -> None:
        valid = list(valid)
        for key in table:
            if key not in valid:
                self.problem(f"{path}.{key}" if path else key, unknown_key_message(key, valid))

    def take(self, table: Mapping[str, Any], key: str, path: str, *, required: bool = False,
             default: Any = None) -> Any:
        full = f"{path}.{key}" if path else key
        value = table.get(key, _MISSING)
        if value is _MISSING:
            if required:
                self.problem(full, "required key is missing")
            return _MISSING if required else default
        return value

    def _check(self, full: str, value: Any, kind: str, ok: bool) -> bool:
        if not ok:
            self.problem(full, f"expected {kind}, got {value!r} ({_type_name(value)})")
        return ok

    def take_str(self, table: Mapping[str, Any], key: str, path: str, *, required: bool = False,
                 default: str | None = None, choices: Sequence[str] | None = None) -> str | None:
        full = f"{path}.{key}" if path else key
        value = self.take(table, key, path, required=required, default=default)
        if value is _MISSING:
            return default
        if value is None:
            return None
        if not self._check(full, value, "a string", isinstance(value, str)):
            return default
        if choices is not None and value not in choices:
            self.problem(full, unknown_key_message(value, choices).replace("unknown key",
                                                                           "unknown value")
                         .replace("valid keys here", "valid values"))
            return default
        return value

    def take_bool(self, table: Mapping[str, Any], key: str, path: str, *, default: bool) -> bool:
        value = self.take(table, key, path, default=default)
        full = f"{path}.{key}" if path else key
        if not self._check(full, value, "true or false", isinstance(value, bool)):
            return default
        return value

    def take_int(self, table: Mapping[str, Any], key: str, path: str, *, default: int,
                 minimum: int | None = None) -> int:
        value = self.take(table, key, path, default=default)
        full = f"{path}.{key}" if path else key
        if not self._check(full, value, "an integer",
                           isinstance(value, int) and not isinstance(value, bool)):
            return default
        if minimum is not None and value < minimum:
            self.problem(full, f"expected an integer >= {minimum}, got {value!r}")
            return default
        return value

    def take_number(self, table: Mapping[str, Any], key: str, path: str, *,
                    default: float | None, positive: bool = True,
                    required: bool = False) -> float | None:
        value = self.take(table, key, path, default=default, required=required)
        if value is _MISSING:
            return default
        if value is None:
            return None
        full = f"{path}.{key}" if path else key
        return self.number(value, full, positive=positive, default=default)

    def number(self, value: Any, full: str, *, positive: bool = True,
               default: float | None = None) -> float | None:
        ok = isinstance(value, int | float) and not isinstance(value, bool)
        if not self._check(full, value, "a number", ok):
            return default
        if not math.isfinite(value) or (positive and value <= 0):
            bound = " > 0" if positive else ""
            self.problem(full, f"expected a finite number{bound}, got {value!r}")
            return default
        return float(value)

    def take_list(self, table: Mapping[str, Any], key: str, path: str, *,
                  item: Callable[[Any, str], Any], default: Sequence[Any] | None = None,
                  required: bool = False, scalar_ok: bool = True,
                  nonempty: bool = True) -> list[Any]:
        """A list (a lone scalar counts as a one-item list when ``scalar_ok``), each item
        checked by ``item(value, path) -> value or _MISSING``; items that fail are left
        out, so use ``take_items`` when later checks must name an item's place."""
        return [value for _, value in self.take_items(
            table, key, path, item=item, default=default, required=required,
            scalar_ok=scalar_ok, nonempty=nonempty)]

    def take_items(self, table: Mapping[str, Any], key: str, path: str, *,
                   item: Callable[[Any, str], Any], default: Sequence[Any] | None = None,
                   required: bool = False, scalar_ok: bool = True,
                   nonempty: bool = True) -> list[tuple[str, Any]]:
        """As ``take_list``, each item that passed with its key path in the file
        (``solvers[0].tolerances[1]``), so a later problem names the item where it is."""
        full = f"{path}.{key}" if path else key
        value = self.take(table, key, path, required=required,
                          default=None if default is None else list(default))
        if value is _MISSING or value is None:
            return []
        if not isinstance(value, list):
            if not scalar_ok:
                self.problem(full, f"expected an array, got {value!r} ({_type_name(value)})")
                return []
            value = [value]
        if nonempty and not value:
            self.problem(full, "expected a non-empty array, got []")
            return []
        out = []
        for i, entry in enumerate(value):
            where = f"{full}[{i}]"
            checked = item(entry, where)
            if checked is not _MISSING:
                out.append((where, checked))
        return out

    # -- item checkers for take_list ---------------------------------------------------------
    def positive_int(self, value: Any, full: str, *, maximum: int | None = None) -> Any:
        if not self._check(full, value, "a positive integer",
                           isinstance(value, int) and not isinstance(value, bool) and value > 0):
            return _MISSING
        if maximum is not None and value > maximum:
            self.problem(full, f"expected an integer <= {maximum}, got {value!r}")
            return _MISSING
        return value

    def seed(self, value: Any, full: str) -> Any:
        if not self._check(full, value, "an integer seed >= 0",
                           isinstance(value, int) and not isinstance(value, bool) and value >= 0):
            return _MISSING
        return value

    def positive_number(self, value: Any, full: str) -> Any:
        checked = self.number(value, full)
        return _MISSING if checked is None else checked

    def choice(self, choices: Sequence[str]) -> Callable[[Any, str], Any]:
        def check(value: Any, full: str) -> Any:
            if not self._check(full, value, "a string", isinstance(value, str)):
                return _MISSING
            if value not in choices:
                self.problem(full, unknown_key_message(value, choices)
                             .replace("unknown key", "unknown value")
                             .replace("valid keys here", "valid values"))
                return _MISSING
            return value
        return check

    def string(self, value: Any, full: str) -> Any:
        if not self._check(full, value, "a string", isinstance(value, str)):
            return _MISSING
        return value

    def table(self, value: Any, full: str) -> dict[str, Any] | None:
        if not isinstance(value, dict):
            self.problem(full, f"expected a table, got {value!r} ({_type_name(value)})")
            return None
        return value

    def tables(self, doc: Mapping[str, Any], key: str, *, required: bool
               ) -> list[tuple[str, dict[str, Any]]]:
        """An array of tables ``[[key]]`` (a single ``[key]`` table is accepted too)."""
        value = doc.get(key, _MISSING)
        if value is _MISSING:
            if required:
                self.problem(key, f"required: at least one [[{key}]] table")
            return []
        if isinstance(value, dict):
            value = [value]
        if not isinstance(value, list) or not value:
            self.problem(key, f"expected one or more [[{key}]] tables, got {value!r}")
            return []
        out = []
        for i, entry in enumerate(value):
            path = f"{key}[{i}]"
            if self.table(entry, path) is not None:
                out.append((path, entry))
        return out
