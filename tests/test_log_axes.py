"""The report's log axes: plain-text powers of ten and sparse minor ticks.

Expected values: powers of ten written out by hand, with the Unicode superscript digits
(U+2070, U+00B9, U+00B2, U+00B3, U+2074-U+2079) and minus (U+207B) of the Unicode
Standard's Superscripts and Subscripts block (Unicode 15.0, chart U2070); tick positions
of matplotlib's ``LogLocator`` with ``subs=(2, 5)`` counted by hand.
"""

from __future__ import annotations

import numpy as np
import pytest
from matplotlib.figure import Figure

from harness.report.style import LOG_MINOR_SUBS, log_scale, power_of_ten_text


@pytest.mark.parametrize(("value", "text"), [
    (1e-4, "10\u207b\u2074"), (1.0, "10\u2070"), (10.0, "10\u00b9"),
    (1e12, "10\u00b9\u00b2"), (1e-10, "10\u207b\u00b9\u2070"),
    (0.002, "0.002"), (0.5, "0.5"), (0.0, "0"), (-3.0, "-3")])
def test_power_of_ten_text(value, text):
    assert power_of_ten_text(value) == text


def test_log_scale_labels_decades_without_mathtext_and_keeps_two_minor_ticks_a_decade():
    fig = Figure()
    ax = fig.subplots()
    ax.plot([1e-6, 1e-2], [1e-6, 1e-2])
    log_scale(ax, "x")
    log_scale(ax, "y")
    ax.set_xlim(1e-6, 1e-2)
    ax.set_ylim(1e-6, 1e-2)
    fig.canvas.draw()
    assert ax.get_xscale() == ax.get_yscale() == "log"
    labels = [t.get_text() for t in ax.get_xticklabels() if t.get_text()]
    assert "10\u207b\u2074" in labels and not any("$" in label for label in labels)
    minor = np.asarray(ax.xaxis.get_minorticklocs())
    inside = minor[(minor >= 1e-6) & (minor <= 1e-2)]
    # four decades, two minor ticks in each: 2e-6, 5e-6, ..., 2e-3, 5e-3
    assert len(inside) == 4 * len(LOG_MINOR_SUBS)
    np.testing.assert_allclose(sorted(inside)[:2], [2e-6, 5e-6], rtol=1e-12)
    with pytest.raises(ValueError, match="which"):
        log_scale(ax, "z")
