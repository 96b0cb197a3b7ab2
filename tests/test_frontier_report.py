"""The check report across solvers: the frontier figure (error against time, one line per
solver, limits, safe region, exact time, non-dominated points), the recommendation in
words, and the table of every (solver, knob value) point, which must agree with
``result.to_dict()["solvers"]``.

The results are hand-made (``frontier_example``); no check is run. Expected numbers are
the fixture's own invented values; the limits are ``harness.audit.rule.Thresholds``'
defaults (common practice). The HTML is read with the standard library's HTML parser
(``html.parser``), not with regular expressions. The browser test follows
``test_report_browser.py``: headless Chromium at 1280 px, skipped only when Chromium is
missing.
"""

from __future__ import annotations

import dataclasses
import math
from html.parser import HTMLParser

import pytest
from frontier_example import (
    EXACT_SECONDS,
    LIMITS,
    NO_SAFE_REASON,
    PLUGIN,
    PLUGIN_FAILURE,
    REFUSAL,
    REFUSED,
    REPEATS,
    frontier_result,
)
from matplotlib.lines import Line2D
from matplotlib.patches import Rectangle
from test_report_browser import CHROMIUM, WIDTH, _visible, measure, screenshot

from harness.report.check_report import render_check_report
from harness.report.frontier_figure import LeftOut, frontier_figure
from harness.report.frontier_points import FRONTIER_METRICS
from harness.report.style import figure_bytes

#: Units of each panel's axis, as the report's labels write them (harness.report.labels).
UNITS = {"loglik_error": "(nats)", "param_shift_se": "(SE)",
         "kriging_mean_sd": "(pred. SD)"}
#: Three significant digits (``number_text.compact``): a printed number is within half a
#: unit of its third digit of the JSON's value.
PRINTED = 5e-3


@pytest.fixture(scope="module")
def result():
    return frontier_result()


@pytest.fixture(scope="module")
def drawn(result):
    found = frontier_figure(result)
    assert found is not None
    return found


@pytest.fixture(scope="module")
def html(result):
    return render_check_report(result)


def _solver_lines(ax) -> dict[str, list[Line2D]]:
    lines: dict[str, list[Line2D]] = {}
    for line in ax.get_lines():
        gid = line.get_gid() or ""
        if gid.startswith("solver:"):
            lines.setdefault(gid.removeprefix("solver:"), []).append(line)
    return lines


# -- the figure ------------------------------------------------------------------------


def test_three_panels_with_units_and_log_axes(drawn):
    axes = drawn.figure.get_axes()
    assert len(axes) == len(FRONTIER_METRICS) == 3
    for ax, name in zip(axes, FRONTIER_METRICS, strict=True):
        assert ax.get_ylabel().endswith(UNITS[name]), ax.get_ylabel()
        assert ax.get_yscale() == "log" and ax.get_xscale() == "log"
    # the panels share the time axis; the bottom one names it with its unit
    assert axes[-1].get_xlabel() == "median time of one fit evaluation (s)"
    assert figure_bytes(drawn.figure, "png")[:8] == b"\x89PNG\r\n\x1a\n"


def test_one_line_per_solver_in_every_panel(result, drawn):
    given = [s["given"] for s in result.solvers]
    assert len(given) == 4
    for ax in drawn.figure.get_axes():
        lines = _solver_lines(ax)
        assert sorted(lines) == sorted(given)
        assert all(len(found) == 1 for found in lines.values()), lines
        # each line is drawn in its own colour and legend label
        assert len({ln[0].get_color() for ln in lines.values()}) == len(given)
        assert [ln[0].get_label() for ln in lines.values()] == list(lines)


def test_lines_pass_through_the_points_in_the_order_listed(result, drawn):
    """hodlr: every point drawn, loose to tight; vecchia's log-likelihood panel: its
    signed errors as magnitudes, without the zero at 40 neighbours; the plugin: only rank
    200 (rank 50 failed); the refused solver: an empty line."""
    ll, shift, krig = drawn.figure.get_axes()
    hodlr = _solver_lines(ll)["hodlr"][0]
    assert list(hodlr.get_xdata()) == [0.05, 0.09, 0.12, 0.2]
    assert list(hodlr.get_ydata()) == [2.6, 0.02, 1e-5, 1e-9]
    vecchia = _solver_lines(ll)["vecchia"][0]
    assert list(vecchia.get_xdata()) == [0.02, 0.04, 0.3]
    assert list(vecchia.get_ydata()) == [0.8, 0.05, 1e-4]
    assert list(_solver_lines(krig)["vecchia"][0].get_xdata()) == [0.02, 0.04, 0.3]
    assert list(_solver_lines(shift)["vecchia"][0].get_xdata()) == [0.02, 0.04, 0.13, 0.3]
    assert list(_solver_lines(shift)[PLUGIN][0].get_xdata()) == [0.5]
    assert len(_solver_lines(shift)[REFUSED][0].get_xdata()) == 0


def test_limits_safe_region_and_exact_time_are_drawn(drawn):
    for ax, name in zip(drawn.figure.get_axes(), FRONTIER_METRICS, strict=True):
        limits = [ln for ln in ax.get_lines() if ln.get_gid() == "limit"]
        assert len(limits) == 1
        assert list(limits[0].get_ydata()) == [LIMITS[name]] * 2
        # the shaded band runs from the bottom of the axis up to the limit
        bands = [p for p in ax.patches if p.get_gid() == "safe"]
        assert len(bands) == 1 and isinstance(bands[0], Rectangle)
        bottom = bands[0].get_y()
        assert math.isclose(bottom, ax.get_ylim()[0])
        assert math.isclose(bottom + bands[0].get_height(), LIMITS[name])
        assert bands[0].get_width() == 1     # the whole width, in axes fraction
        exact = [ln for ln in ax.get_lines() if ln.get_gid() == "exact"]
        assert len(exact) == 1 and list(exact[0].get_xdata()) == [EXACT_SECONDS] * 2
        low, high = ax.get_xlim()
        assert low < 0.02 and high > EXACT_SECONDS


def test_non_dominated_points_are_ringed(drawn):
    """The fixture marks hodlr's four points and vecchia's first two non-dominated; in
    the log-likelihood panel all six are drawn, so six rings."""
    ll = drawn.figure.get_axes()[0]
    rings = [ln for ln in ll.get_lines() if ln.get_marker() == "o"
             and ln.get_markerfacecolor() == "none" and ln.get_markersize() == 13]
    centres = sorted((float(r.get_xdata()[0]), float(r.get_ydata()[0])) for r in rings)
    assert centres == sorted([(0.05, 2.6), (0.09, 0.02), (0.12, 1e-5), (0.2, 1e-9),
                              (0.02, 0.8), (0.04, 0.05)])


def test_caption_counts_every_point_left_out(drawn):
    assert drawn.left_out == {
        "loglik_error": LeftOut(no_value=1, zero=1),      # rank 50 failed; 0 at 40
        "param_shift_se": LeftOut(no_value=1),            # rank 50
        "kriging_mean_sd": LeftOut(no_value=2),           # rank 50; null at 40
    }
    caption = drawn.caption
    assert "log-likelihood error (nats): 1 with no value, 1 at zero" in caption
    assert "parameter shift (SE): 1 with no value" in caption
    assert "kriging error (pred. SD): 2 with no value" in caption
    assert f"Nothing to draw for {REFUSED} (refused)" in caption
    assert "0.97 s" in caption and f"over {REPEATS} repeats" in caption


def test_a_point_without_time_is_counted_not_dropped():
    result = frontier_result(solvers=("hodlr",))
    hodlr = dict(result.solvers[0])
    hodlr["points"] = [p | {"time": {**p["time"], "seconds": None}} if i == 0 else p
                       for i, p in enumerate(hodlr["points"])]
    drawn = frontier_figure(dataclasses.replace(result, solvers=(hodlr,)))
    assert drawn is not None
    assert all(c == LeftOut(no_time=1) for c in drawn.left_out.values())
    assert drawn.caption.count("1 with no time") == 3
    assert len(_solver_lines(drawn.figure.get_axes()[0])["hodlr"][0].get_xdata()) == 3


def test_a_single_solver_is_still_drawn_and_nothing_left_out_is_said():
    result = frontier_result(solvers=("hodlr",))
    drawn = frontier_figure(result)
    assert drawn is not None
    for ax in drawn.figure.get_axes():
        assert list(_solver_lines(ax)) == ["hodlr"]
    assert "No point was left out of the log axes." in drawn.caption
    html = render_check_report(result)
    assert 'id="frontier"' in html and "Error against time" in html


def test_a_result_without_solvers_has_no_frontier():
    result = dataclasses.replace(frontier_result(), solvers=(), frontier={})
    assert frontier_figure(result) is None
    assert 'id="frontier"' not in render_check_report(result)


def test_without_an_exact_time_no_vertical_line_and_the_caption_says_so():
    result = frontier_result(solvers=("hodlr",))
    result = dataclasses.replace(result, frontier=result.frontier | {"exact_seconds": None})
    drawn = frontier_figure(result)
    assert drawn is not None
    assert not [ln for ax in drawn.figure.get_axes() for ln in ax.get_lines()
                if ln.get_gid() == "exact"]
    assert "was not measured" in drawn.caption


# -- the HTML ------------------------------------------------------------------------


class _Page(HTMLParser):
    """The frontier table's cells row by row, the summary's terms, the text of each
    paragraph with an id, the sections in order and each image's section and source."""

    def __init__(self) -> None:
        super().__init__(convert_charrefs=True)
        self.sections: list[str] = []
        self.images: list[tuple[str, str]] = []
        self.header: list[str] = []
        self.rows: list[list[str]] = []
        self.summary: list[tuple[str, str]] = []
        self.paragraphs: dict[str, str] = {}
        self._table = self._summary = False
        self._paragraph = ""
        self._cell: list[str] | None = None
        self._tag = ""

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        found = dict(attrs)
        if tag == "section":
            self.sections.append(found.get("id") or "")
        if tag == "img":
            self.images.append((self.sections[-1] if self.sections else "",
                                found.get("src") or ""))
        if tag == "table":
            self._table = found.get("id") == "frontier-table"
        if tag == "dl" and found.get("id") == "frontier-summary":
            self._summary = True
        if tag == "p" and found.get("id"):
            self._paragraph = str(found.get("id"))
            self.paragraphs[self._paragraph] = ""
        if self._table and tag == "tr":
            self.rows.append([])
        if self._table and tag in ("td", "th"):
            self._cell = []
        if self._summary and tag in ("dt", "dd"):
            self._tag, self._cell = tag, []

    def handle_endtag(self, tag: str) -> None:
        if tag == "table":
            self._table = False
        if tag == "dl":
            self._summary = False
        if tag == "p":
            self._paragraph = ""
        if self._cell is not None and tag in ("td", "th") and self._table:
            text = " ".join("".join(self._cell).split())
            (self.header if not self.rows[-1] and tag == "th" else self.rows[-1]).append(
                text)
            self._cell = None
        if self._cell is not None and tag in ("dt", "dd") and self._summary:
            self.summary.append((tag, " ".join("".join(self._cell).split())))
            self._cell = None

    def handle_data(self, data: str) -> None:
        if self._cell is not None:
            self._cell.append(data)
        if self._paragraph:
            self.paragraphs[self._paragraph] += data


def _page(html: str) -> _Page:
    page = _Page()
    page.feed(html)
    page.close()
    page.rows = [r for r in page.rows if r]
    return page


def _number(text: str) -> float:
    return float(text.replace(",", "").replace("\u2718", "").strip())


def _agrees(text: str, value: float | None) -> bool:
    """A printed cell agrees with the JSON's value: both empty, or within the printing's
    precision."""
    if value is None:
        return text == ""
    assert math.isfinite(value)
    return math.isclose(_number(text), value, rel_tol=PRINTED)


def _split(cell: str) -> tuple[str, str]:
    value, _, unc = cell.partition("\u00b1")
    return value.strip(), unc.strip()


def test_table_agrees_with_the_json(result, html):
    page = _page(html)
    header = page.header
    column = {name: header.index(name) for name in (
        "solver", "knob", "status", "non-dominated", "median s", "repeats",
        "first call s", "peak MiB", "note")}
    metric_columns = [next(i for i, h in enumerate(header) if h.startswith(short))
                      for short in ("\u0394 log-lik", "param. shift", "kriging error")]
    solvers = result.to_dict()["solvers"]
    expected_rows = sum(max(1, len(s["points"])) for s in solvers)
    assert expected_rows == 11 and len(page.rows) == expected_rows
    rows = iter(page.rows)
    compared = 0
    for solver in solvers:
        if not solver["points"]:
            row = next(rows)
            assert row[column["solver"]] == solver["given"]
            assert row[column["status"]] == solver["status"]
            assert row[column["note"]].startswith(solver["problem"][:40])
            continue
        for point in solver["points"]:
            row = next(rows)
            knob = solver["knob"]["name"]
            assert row[column["solver"]] == solver["given"]
            assert row[column["knob"]].split()[0] == knob
            assert _agrees(row[column["knob"]].split()[1], point["knob_value"])
            assert row[column["status"]] == point["status"]
            assert row[column["non-dominated"]] == ("yes" if point["nondominated"] else "no")
            time = point["time"]
            assert _agrees(row[column["median s"]], time["seconds"])
            assert int(row[column["repeats"]]) == len(time["repeats"])
            assert _agrees(row[column["first call s"]], time["first_call_seconds"])
            peak = time["peak_bytes"]
            assert _agrees(row[column["peak MiB"]], None if peak is None else peak / 2**20)
            for index, name in zip(metric_columns, FRONTIER_METRICS, strict=True):
                entry = point.get(name) or {}
                value, unc = _split(row[index])
                assert _agrees(value, entry.get("value"))
                assert _agrees(unc, entry.get("uncertainty") or None)
                compared += 1
    assert compared == 3 * 10
    assert next(rows, None) is None


def test_table_header_names_the_limits(html):
    header = _page(html).header
    for short, limit in (("\u0394 log-lik", 0.1), ("param. shift", 0.1),
                         ("kriging error", 0.05)):
        cell = next(h for h in header if h.startswith(short))
        assert cell.endswith(f"limit {limit:g}")


def test_failure_and_pick_are_noted_in_the_table(html):
    page = _page(html)
    notes = {row[0] + " " + row[1]: row[-1] for row in page.rows}
    assert notes["hodlr tol 1e-6"] == "pick"
    assert notes[f"{PLUGIN} rank 50"].startswith("raised ValueError")
    assert notes[f"{PLUGIN} rank 50"].endswith("[1]")
    assert notes[f"{REFUSED} tol"].endswith("[2]")
    assert PLUGIN_FAILURE in html and REFUSAL in html


def test_summary_states_pick_ties_no_safe_and_speedups(result, html):
    page = _page(html)
    assert page.paragraphs["frontier-statement"] == result.frontier["statement"]
    terms: dict[str, list[str]] = {}
    for (tag, term), (_, text) in zip(page.summary[::2], page.summary[1::2], strict=True):
        assert tag == "dt"
        terms.setdefault(term, []).append(text)
    assert terms["pick"] == ["hodlr at tol 1e-6 (0.12 s)"]
    assert terms["tied with"][0].startswith("vecchia at neighbours 40 (0.13 s), p = 0.41")
    # 0.97 / 0.12 = 8.08; 0.13 / 0.12 = 1.08 (the fixture's invented times)
    assert terms["speed-up"] == ["8.08\u00d7 over the exact computation (dense, 0.97 s); "
                                 "1.08\u00d7 over vecchia"]
    assert terms["no safe setting"] == [f"{PLUGIN}: {NO_SAFE_REASON}",
                                        f"{REFUSED}: {REFUSAL}"]
    # the refused solver's problem is its no-safe reason, so it is said once
    assert terms["problem"] == [f"{PLUGIN}: solver failed, raised ValueError at rank 50"]


def test_answer_names_the_recommended_solver_only_when_there_are_several(html):
    assert " ".join(_page(html).paragraphs["recommendation"].split()) == (
        "Recommended tolerance: 1e-6 with hodlr")
    alone = render_check_report(frontier_result(solvers=("hodlr",)))
    assert " ".join(_page(alone).paragraphs["recommendation"].split()) == (
        "Recommended tolerance: 1e-6")


def test_frontier_comes_first_and_its_figure_is_the_first_image(html):
    page = _page(html)
    assert page.sections.index("frontier") == page.sections.index("answer") + 1
    assert page.sections.index("frontier") < page.sections.index("verdicts")
    section, source = page.images[0]
    assert section == "frontier"
    # embedded, not linked: the report stays one self-contained file
    assert source.startswith("data:image/svg+xml;base64,") and len(source) > 10_000


# -- in a browser --------------------------------------------------------------------


@pytest.mark.skipif(CHROMIUM is None, reason="needs a Chromium browser "
                    "(Debian: apt-get install chromium)")
def test_frontier_renders_at_1280_px_without_a_clipped_table(html, tmp_path):
    path = tmp_path / "check.html"
    path.write_text(html, encoding="utf-8")
    m = measure(html, ["#frontier-table", "#frontier-table-box",
                       "#frontier-table thead th:last-child", "#frontier figure img",
                       "#frontier-statement"], tmp_path)
    assert m["viewport"] == WIDTH
    assert m["scrollWidth"] <= WIDTH, "the page scrolls sideways"
    table, box = m["boxes"]["#frontier-table"], m["boxes"]["#frontier-table-box"]
    _visible(table, WIDTH)
    _visible(box, WIDTH)
    # the table fits its scrolling box: nothing is hidden behind a scroll bar
    assert table["right"] <= box["right"] + 0.5, (table, box)
    last = m["boxes"]["#frontier-table thead th:last-child"]
    assert last["text"] == "note"
    _visible(last, WIDTH)
    image = m["boxes"]["#frontier figure img"]
    _visible(image, WIDTH)
    assert image["bottom"] - image["top"] > 300
    _visible(m["boxes"]["#frontier-statement"], WIDTH)
    screenshot(path, "check_report_frontier", tmp_path)


def test_a_time_from_another_source_is_named_in_the_caption():
    """Without timing repeats the pipeline gives a point the audit's time and names its
    source (``time.source``); the caption counts such points."""
    result = frontier_result(solvers=("hodlr",))
    hodlr = dict(result.solvers[0])
    source = "audit log-likelihood (median over solver seeds)"
    hodlr["points"] = [p | {"time": {**p["time"], "source": source}}
                       for p in hodlr["points"]]
    drawn = frontier_figure(dataclasses.replace(result, solvers=(hodlr,)))
    assert drawn is not None
    assert f"4 point(s) show another time than timing repeats: {source}." in drawn.caption


def test_every_solver_refused_still_gives_three_empty_panels_and_a_table():
    result = frontier_result(solvers=(REFUSED,))
    result = dataclasses.replace(result, frontier=result.frontier | {"recommended": None})
    drawn = frontier_figure(result)
    assert drawn is not None
    for ax in drawn.figure.get_axes():
        assert [len(ln.get_xdata()) for ln in _solver_lines(ax)[REFUSED]] == [0]
        assert any(t.get_text().startswith("nothing to draw") for t in ax.texts)
    assert f"Nothing to draw for {REFUSED} (refused)." in drawn.caption
    page = _page(render_check_report(result))
    assert [row[:3] for row in page.rows] == [[REFUSED, "tol", "refused"]]
    assert ("dd", "none: no solver has a safe setting") in page.summary


def test_a_solver_name_with_markup_and_dollars_is_escaped_and_drawn_as_text():
    """A plugin is named as the user spelled ``--solver``: ``<`` must not become markup
    and ``$`` must not start matplotlib's mathtext."""
    result = frontier_result(solvers=("hodlr",))
    odd = "pkg.<b>mod</b>:make$x$"
    hodlr = dict(result.solvers[0]) | {"given": odd}
    result = dataclasses.replace(result, solvers=(hodlr,),
                                 frontier=result.frontier | {"recommended": None})
    drawn = frontier_figure(result)
    assert drawn is not None
    assert figure_bytes(drawn.figure, "svg").startswith(b"<?xml")
    # escaped, so mathtext keeps "$x$" as written instead of an italic x
    assert _solver_lines(drawn.figure.get_axes()[0])[odd][0].get_label() == (
        "pkg.<b>mod</b>:make\\$x\\$")
    html = render_check_report(result)
    assert "<b>mod</b>" not in html and "pkg.&lt;b&gt;mod&lt;/b&gt;:make$x$" in html
    assert _page(html).rows[0][0] == odd


def test_the_report_is_the_same_twice(result, html):
    assert render_check_report(result) == html
