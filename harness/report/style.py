"""Colour-blind-safe series styling and deterministic figure serialization.

Colours are the Okabe-Ito palette (Okabe & Ito, *Color Universal Design*, 2008), without
its yellow, which is too pale on white. Every series also gets its own marker and line
style, so no meaning rests on colour alone. Figures are written inside an
``rc_context`` with a fixed ``svg.hashsalt`` and without date or creator metadata, so the
same results give byte-identical files.
"""

from __future__ import annotations

import base64
import io
import math
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from typing import Any

import matplotlib as mpl
from matplotlib.axes import Axes
from matplotlib.figure import Figure
from matplotlib.ticker import FuncFormatter, LogLocator

PALETTE: tuple[str, ...] = ("#0072B2", "#D55E00", "#009E73", "#CC79A7", "#E69F00",
                            "#56B4E9", "#000000")
MARKERS: tuple[str, ...] = ("o", "s", "^", "D", "v", "P", "X", "*")
LINESTYLES: tuple[str, ...] = ("-", "--", "-.", ":")
THRESHOLD_STYLE: dict[str, Any] = {"color": "#444444", "linestyle": (0, (6, 3)),
                                   "linewidth": 1.2}

RC: dict[str, Any] = {
    "svg.hashsalt": "covaudit",
    "svg.fonttype": "path",
    "pdf.fonttype": 42,
    "font.size": 9,
    "axes.grid": True,
    "grid.alpha": 0.3,
    "legend.fontsize": 7,
    "figure.dpi": 100,
}

#: Minor ticks of a log axis: 2 and 5 times each power of ten. Matplotlib's default (2 to 9
#: times) puts up to 8 ticks in every decade; on axes spanning ten decades of error those
#: ticks made a figure's constrained layout several times slower to draw
#: (``benchmarks/figure_drawing.py``) and add little that the grid does not show.
LOG_MINOR_SUBS: tuple[float, ...] = (2.0, 5.0)

_SUPERSCRIPT = str.maketrans("-0123456789",
                             "\u207b\u2070\u00b9\u00b2\u00b3\u2074\u2075\u2076\u2077\u2078\u2079")

_METADATA = {
    "svg": {"Date": None, "Creator": None},
    "pdf": {"CreationDate": None, "ModDate": None, "Creator": None, "Producer": None},
    "png": {"Software": None},
}


@dataclass(frozen=True)
class SeriesStyle:
    color: str
    marker: str
    linestyle: str

    def kwargs(self) -> dict[str, Any]:
        return {"color": self.color, "marker": self.marker, "linestyle": self.linestyle}


def series_style(index: int) -> SeriesStyle:
    """The style of the ``index``-th series (colour, marker and line style all vary)."""
    return SeriesStyle(PALETTE[index % len(PALETTE)], MARKERS[index % len(MARKERS)],
                       LINESTYLES[(index // len(PALETTE) + index) % len(LINESTYLES)])


def plain(text: object) -> str:
    """A label safe from mathtext parsing (user strings may contain ``$``)."""
    return str(text).replace("$", r"\$")


def power_of_ten_text(value: float, _position: object = None) -> str:
    """A log axis' major tick label without mathtext: ``10\u207b\u2074`` for 1e-4, and
    ``%g`` for a value that is not a power of ten (a short axis)."""
    if value > 0:
        exponent = round(math.log10(value))
        if math.isclose(value, 10.0 ** exponent, rel_tol=1e-9):
            return f"10{str(exponent).translate(_SUPERSCRIPT)}"
    return f"{value:g}"


def log_scale(ax: Axes, which: str) -> None:
    """Put the ``which`` ("x" or "y") axis of ``ax`` on a log scale, with major labels in
    plain text (``power_of_ten_text``) and minor ticks at ``LOG_MINOR_SUBS``."""
    if which not in ("x", "y"):
        raise ValueError(f"which must be 'x' or 'y', got {which!r}")
    axis = ax.xaxis if which == "x" else ax.yaxis
    (ax.set_xscale if which == "x" else ax.set_yscale)("log")
    axis.set_major_formatter(FuncFormatter(power_of_ten_text))
    axis.set_minor_locator(LogLocator(subs=LOG_MINOR_SUBS))


@contextmanager
def figure_rc() -> Iterator[None]:
    """The fixed rc settings under which covaudit draws and saves figures."""
    with mpl.rc_context(RC):  # type: ignore[arg-type]  # the stubs list every rc key
        yield


def figure_bytes(fig: Figure, fmt: str) -> bytes:
    """Serialize ``fig`` as ``svg``, ``pdf`` or ``png`` without varying metadata."""
    if fmt not in _METADATA:
        raise ValueError(f"figure format must be one of {', '.join(_METADATA)}, got {fmt!r}")
    buf = io.BytesIO()
    with figure_rc():
        fig.savefig(buf, format=fmt, metadata=_METADATA[fmt])
    return buf.getvalue()


def data_uri(fig: Figure, fmt: str = "svg") -> str:
    """``data:image/svg+xml;base64,...`` (or png) for embedding in an ``<img>``."""
    mime = {"svg": "image/svg+xml", "png": "image/png"}[fmt]
    return f"data:{mime};base64,{base64.b64encode(figure_bytes(fig, fmt)).decode('ascii')}"
