"""Budget values as written in case files: bytes with binary or decimal units, seconds."""

from __future__ import annotations

import re

_UNITS = {"": 1, "b": 1, "kb": 10**3, "mb": 10**6, "gb": 10**9, "tb": 10**12,
          "kib": 2**10, "mib": 2**20, "gib": 2**30, "tib": 2**40}
_PATTERN = re.compile(r"^\s*([0-9]*\.?[0-9]+(?:[eE][+-]?[0-9]+)?)\s*([A-Za-z]*)\s*$")


def parse_bytes(value: int | float | str) -> int:
    """Bytes from an integer or a string such as ``"4 GiB"``, ``"512MB"``, ``"1e9"``.

    Raises ValueError naming the accepted units when the text cannot be read.
    """
    if isinstance(value, bool):
        raise ValueError(f"expected a size in bytes such as 4000000000 or '4 GiB', got {value!r}")
    if isinstance(value, int | float):
        if value <= 0:
            raise ValueError(f"expected a positive size, got {value!r}")
        return int(value)
    match = _PATTERN.match(str(value))
    unit = match.group(2).lower() if match else None
    if match is None or unit not in _UNITS:
        raise ValueError(
            f"expected a size such as '4 GiB' or '512 MB' (units: "
            f"{', '.join(k for k in _UNITS if k)}), got {value!r}")
    size = int(float(match.group(1)) * _UNITS[unit])
    if size <= 0:
        raise ValueError(f"expected a positive size, got {value!r}")
    return size


def format_bytes(size: float) -> str:
    """``1536 -> '1.5 KiB'``."""
    for unit in ("B", "KiB", "MiB", "GiB", "TiB"):
        if abs(size) < 1024 or unit == "TiB":
            return f"{size:.0f} {unit}" if unit == "B" else f"{size:.1f} {unit}"
        size /= 1024
    return f"{size:.1f} TiB"
