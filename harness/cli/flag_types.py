"""argparse ``type=`` functions for numeric flags, and "did you mean" for names.

Each factory returns a converter that accepts only finite numbers in a stated range and
otherwise raises ``argparse.ArgumentTypeError`` with the accepted range; argparse then
prints ``covaudit VERB: error: argument --FLAG: ...`` (naming the flag) and exits 2.

    >>> positive_int("--workers")("3")
    3
"""

from __future__ import annotations

import argparse
import difflib
import math
from collections.abc import Callable, Iterable


def _number(flag: str, text: str, kind: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(
            f"{text!r} is not a number ({flag} takes {kind})") from None
    if not math.isfinite(value):
        raise argparse.ArgumentTypeError(
            f"{text!r} is not a finite number ({flag} takes {kind})")
    return value


def int_range(flag: str, low: int | None = None, high: int | None = None
              ) -> Callable[[str], int]:
    """Integers in ``[low, high]`` (either end open when None)."""
    kind = _range_text("an integer", low, high)

    def convert(text: str) -> int:
        value = _number(flag, text, kind)
        if value != int(value):
            raise argparse.ArgumentTypeError(f"{text!r} is not a whole number ({flag} takes "
                                             f"{kind})")
        number = int(value)
        if (low is not None and number < low) or (high is not None and number > high):
            raise argparse.ArgumentTypeError(f"{number} is out of range ({flag} takes "
                                             f"{kind})")
        return number

    convert.__name__ = f"{flag} value"
    return convert


def float_range(flag: str, low: float | None = None, high: float | None = None, *,
                low_open: bool = False, high_open: bool = False) -> Callable[[str], float]:
    """Finite floats in the range; ``low_open`` / ``high_open`` exclude the ends."""
    kind = _range_text("a number", low, high, low_open=low_open, high_open=high_open)

    def convert(text: str) -> float:
        value = _number(flag, text, kind)
        below = low is not None and (value < low or (low_open and value == low))
        above = high is not None and (value > high or (high_open and value == high))
        if below or above:
            raise argparse.ArgumentTypeError(f"{value:g} is out of range ({flag} takes "
                                             f"{kind})")
        return value

    convert.__name__ = f"{flag} value"
    return convert


def positive_int(flag: str) -> Callable[[str], int]:
    """Integers >= 1."""
    return int_range(flag, 1)


def nonnegative_int(flag: str) -> Callable[[str], int]:
    """Integers >= 0."""
    return int_range(flag, 0)


def positive_float(flag: str) -> Callable[[str], float]:
    """Finite floats > 0."""
    return float_range(flag, 0.0, low_open=True)


def tolerance(flag: str = "--tol") -> Callable[[str], float]:
    """Compression tolerances: finite, in (0, 1)."""
    return float_range(flag, 0.0, 1.0, low_open=True, high_open=True)


def _range_text(kind: str, low: float | None, high: float | None, *,
                low_open: bool = False, high_open: bool = False) -> str:
    if low is not None and high is not None:
        left, right = ("(" if low_open else "["), (")" if high_open else "]")
        return f"{kind} in {left}{low:g}, {high:g}{right}"
    if low is not None:
        return f"{kind} {'>' if low_open else '>='} {low:g}"
    if high is not None:
        return f"{kind} {'<' if high_open else '<='} {high:g}"
    return f"{kind}"


def did_you_mean(name: str, choices: Iterable[str]) -> str:
    """`` (did you mean 'hodlr'?)`` for the closest of ``choices`` (difflib), else ''."""
    close = difflib.get_close_matches(name, list(choices), n=1, cutoff=0.6)
    return f" (did you mean {close[0]!r}?)" if close else ""
