"""The one JSON form of result records, used by every writer in the package.

Strict JSON (RFC 8259) has no NaN or infinity, so non-finite floats become ``null``;
numpy scalars and arrays become Python numbers and lists; objects with ``to_dict`` go
through it; mappings get string keys.
"""

from __future__ import annotations

import json
import math
from collections.abc import Mapping
from typing import Any

import numpy as np


def to_jsonable(value: Any) -> Any:
    """A JSON-safe copy of ``value``.

    numpy scalars and arrays become Python values, non-finite floats ``None``, mappings
    dicts with ``str`` keys, sequences and sets lists, objects with a ``to_dict`` method
    their dict; anything else unknown becomes its ``repr`` (never an exception while a
    result is being saved).
    """
    if value is None or isinstance(value, bool | str | int):
        return value
    if isinstance(value, float):
        return value if math.isfinite(value) else None
    if isinstance(value, np.generic):
        return to_jsonable(value.item())
    if isinstance(value, np.ndarray):
        return to_jsonable(value.tolist())
    if isinstance(value, Mapping):
        return {str(k): to_jsonable(v) for k, v in value.items()}
    if isinstance(value, list | tuple | set | frozenset):
        return [to_jsonable(v) for v in value]
    to_dict = getattr(value, "to_dict", None)
    if callable(to_dict):
        return to_jsonable(to_dict())
    return repr(value)


def json_text(value: Any, *, indent: int | None = 2, sort_keys: bool = False) -> str:
    """Strict JSON text of ``value`` (through ``to_jsonable``; NaN is never written)."""
    return json.dumps(to_jsonable(value), indent=indent, sort_keys=sort_keys, allow_nan=False)


def canonical_json(value: Any) -> str:
    """Compact, key-sorted JSON of ``value``: the same text for the same content, for
    hashing (stable task keys)."""
    return json.dumps(to_jsonable(value), sort_keys=True, separators=(",", ":"),
                      allow_nan=False)
