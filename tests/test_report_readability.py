"""Reports a reader can use without the code: every axis names its unit, the user's
coordinate unit reaches the check and run reports, a solver breakdown repeated over the
solver's seeds is said once, a broken knob value is marked in the figures (not dropped),
human labels replace results.csv keys, the run report's contents match its sections, and
``export`` with fewer than 3 sizes writes its tables and says why no exponent is fitted.

Results are hand-made (``check_example``) or synthetic (``synthetic.write_synthetic_run``);
the expected texts are the report's own wording, written here by hand. The HTML is read
with the standard library's parser (``html.parser``).
"""

from __future__ import annotations

import dataclasses
import re
import shutil
from html import unescape
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from check_example import BREAKDOWN, example_points, example_result
from matplotlib.figure import Figure
from synthetic import write_synthetic_run

from harness.analysis import load_run
from harness.analysis.regression import Comparison
from harness.analysis.scaling_table import MEMORY_METRICS, scaling_rows
from harness.audit.rule import Thresholds
from harness.cli import main
from harness.report import check_figures, figures, render_report
from harness.report.check_figures import BROKEN_LABEL
from harness.report.check_report import render_check_report
from harness.report.condense import per_seed_failures
from harness.report.export import export_methods
from harness.report.labels import RESULT_COLUMN_LABELS

#: An axis label ends with its unit in parentheses: ``total time (s)``.
UNIT_AT_END = re.compile(r"\([^()]+\)$")
#: A results.csv key as a header (``loglik_abs_err``), not words.
RAW_KEY = re.compile(r"^[a-z]+(_[a-z0-9]+)+$")
SMOKE = Path(__file__).resolve().parents[1] / "reference" / "baselines" / "smoke"
BROKEN_TOL = 1e-3        # check_example's knob value that broke down


def _seed_breakdown(result):
    """``result`` with its broken row failing the same way on three solver seeds, as the
    audit engine records it (``seed i (s): message`` joined by ``; ``)."""
    failures = [f"seed {i} ({s}): {BREAKDOWN}" for i, s in enumerate((101, 102, 103))]
    rows = tuple(dataclasses.replace(r, error="; ".join(failures), reasons=tuple(
        f"solver failed: {f}" for f in failures)) if r.error else r
        for r in result.tolerances)
    return dataclasses.replace(result, tolerances=rows)


def _text(html: str) -> str:
    return unescape(re.sub(r"\s+", " ", re.sub(r"<[^>]+>", " ", html)))


class _Outline(HTMLParser):
    """The table of contents (href, text), each section's first heading (id, text) and
    the header cells of every table outside a ``<details>``."""

    def __init__(self) -> None:
        super().__init__()
        self.toc: list[tuple[str, str]] = []
        self.headings: list[tuple[str, str]] = []
        self.headers: list[str] = []
        self._stack: list[str] = []
        self._section = ""
        self._capture: str | None = None
        self._href = ""
        self._buffer = ""
        self._details = 0

    def handle_starttag(self, tag, attrs):
        attrs = dict(attrs)
        if tag == "section":
            self._section = attrs.get("id", "")
        if tag == "details":
            self._details += 1
        if tag == "a" and "nav" in self._stack:
            self._capture, self._href, self._buffer = "toc", attrs.get("href", ""), ""
        elif tag == "h2" and self._section:
            self._capture, self._buffer = "h2", ""
        elif tag == "th" and not self._details:
            self._capture, self._buffer = "th", ""
        self._stack.append(tag)

    def handle_endtag(self, tag):
        if tag == "details":
            self._details -= 1
        if self._capture == "toc" and tag == "a":
            self.toc.append((self._href, " ".join(self._buffer.split())))
            self._capture = None
        elif self._capture == "h2" and tag == "h2":
            self.headings.append((self._section, " ".join(self._buffer.split())))
            self._capture = None
        elif self._capture == "th" and tag == "th":
            self.headers.append(" ".join(self._buffer.split()))
            self._capture = None
        while self._stack and self._stack.pop() != tag:
            pass

    def handle_data(self, data):
        if self._capture:
            self._buffer += data


def outline(html: str) -> _Outline:
    parser = _Outline()
    parser.feed(html)
    parser.close()
    return parser


# -- the check report -----------------------------------------------------------------


def test_per_seed_failures_says_each_message_once_with_its_seeds():
    # expected strings written by hand from the inputs
    assert per_seed_failures("seed 0 (11): lost x; try y; seed 1 (12): lost x; try y; "
                             "seed 2 (13): other") == "seeds 0 and 1: lost x; try y; " \
                                                      "seed 2: other"
    assert per_seed_failures("the dense reference failed at tol 0.1: z; seed 0 (5): a") \
        == "the dense reference failed at tol 0.1: z; seed 0: a"
    assert per_seed_failures("plain; text") == "plain; text"


def test_a_breakdown_on_every_seed_is_said_once_and_whole():
    html = render_check_report(_seed_breakdown(example_result()))
    assert html.count(BREAKDOWN) == 1
    text = _text(html)
    assert f"seeds 0, 1 and 2: {BREAKDOWN}" in text
    assert "\u2026" not in text                    # nothing cut short
    # the reasons behind the verdict point to the table instead of repeating the message
    assert "solver failed (the message is in the verdict table)" in text


def test_speed_below_one_reads_as_slower():
    text = _text(render_check_report(example_result(slow=True)))
    # recommended 1e-6 at 3.2 x 0.3 = 0.96 (check_example's invented numbers)
    assert "Slower: 0.96\u00d7 the speed of the dense computation" in text
    assert "the speed than" not in text
    fast = _text(render_check_report(example_result()))
    assert "3.2\u00d7 faster than the dense computation" in fast


def test_check_report_names_the_coordinate_and_value_units():
    points, holdout = example_points()
    text = _text(render_check_report(example_result(), points=points, holdout=holdout,
                                     coord_units="m"))
    assert "coordinates planar in m." in text
    assert "lengthscale m 1.9" in text
    assert "variance (units of the observed values)\u00b2 0.8" in text
    assert "RMSE 0.3 (units of the observed values)" in text
    default = _text(render_check_report(example_result()))
    assert "coordinates planar in coordinate units." in default
    lonlat = _text(render_check_report(dataclasses.replace(example_result(),
                                                           coord_system="lonlat"),
                                       coord_units="m"))
    # lon/lat are degrees whatever the caller says; distances are chordal km
    assert ("coordinates lonlat in degrees (distances and length scales in chordal km)"
            in lonlat)
    assert "lengthscale chordal km 1.9" in lonlat


# -- the figures ----------------------------------------------------------------------


def _assert_units(fig: Figure | None, *, units: tuple[str, ...] = ()) -> list[str]:
    assert fig is not None
    labels = []
    for ax in fig.get_axes():
        for label in (ax.get_xlabel(), ax.get_ylabel()):
            assert UNIT_AT_END.search(label), f"no unit in axis label {label!r}"
            labels.append(label)
    for unit in units:
        assert any(label.endswith(unit) for label in labels), (unit, labels)
    return labels


def test_check_figures_put_the_unit_into_every_axis_label():
    result = example_result()
    labels = _assert_units(check_figures.error_vs_tolerance(result),
                           units=("(nats)", "(SE)", "(pred. SD)"))
    assert "compression tolerance (relative; looser \u2192)" in labels
    _assert_units(check_figures.speedup_vs_tolerance(result), units=("(\u00d7)",))
    points, holdout = example_points()
    labels = _assert_units(check_figures.points_map(points, holdout, units="m"))
    assert labels == ["first coordinate (m)", "second coordinate (m)"]


def test_a_knob_other_than_tol_is_labelled_with_its_unit():
    result = example_result()
    rows = tuple(dataclasses.replace(r, tol=None, knob_name="neighbours",
                                     knob_value=float(k))
                 for r, k in zip(result.tolerances, (10, 20, 40, 80, 160), strict=True))
    other = dataclasses.replace(result, tolerances=rows, recommended_tolerance=None,
                                knob={"name": "neighbours", "more_accurate": "larger"},
                                recommended_knob={"solver": "vecchia", "name": "neighbours",
                                                  "value": 80.0})
    labels = _assert_units(check_figures.error_vs_tolerance(other))
    assert "neighbours, larger is more accurate (count)" in labels


def test_run_figures_put_the_unit_into_every_axis_label(tmp_path):
    run = load_run(write_synthetic_run(
        tmp_path / "run", rng=np.random.default_rng(4), sizes=(500, 1000, 2000, 4000),
        tolerances=(1e-2, 1e-4, 1e-6), seeds=(0, 1), probes=(16, 64), dense_max_n=2000))
    rows = scaling_rows(run, rng=np.random.default_rng(0))
    th = Thresholds()
    _assert_units(figures.accuracy_vs_tolerance(run.results, thresholds=th),
                  units=("(nats)", "(SE)", "(predictive SD)", "(relative)"))
    _assert_units(figures.error_vs_n(run.results, thresholds=th), units=("(points)",))
    _assert_units(figures.cost_vs_n(run.results, rows, metrics=("t_factor", "t_total")),
                  units=("(s)",))
    _assert_units(figures.cost_vs_n(run.results, rows, metrics=MEMORY_METRICS),
                  units=("(bytes)",))
    _assert_units(figures.trace_vs_probes(run.results), units=("(vectors)",))


def _broken_marks(fig: Figure | None) -> list[list[float]]:
    assert fig is not None
    return [[float(x) for x in line.get_xdata()] for ax in fig.get_axes()
            for line in ax.get_lines() if line.get_label() == BROKEN_LABEL]


def test_a_broken_tolerance_is_marked_in_every_panel_not_dropped():
    result = example_result()
    errors = check_figures.error_vs_tolerance(result)
    assert errors is not None
    # one mark per panel, at the broken tolerance, inside the axis limits
    assert _broken_marks(errors) == [[BROKEN_TOL]] * len(errors.get_axes())
    for ax in errors.get_axes():
        low, high = ax.get_xlim()
        assert low < BROKEN_TOL < high
        assert BROKEN_LABEL in [t.get_text() for t in ax.get_legend().get_texts()]
    assert _broken_marks(check_figures.speedup_vs_tolerance(result)) == [[BROKEN_TOL]]
    # without a breakdown there is nothing to mark
    clean = dataclasses.replace(result, tolerances=tuple(
        r for r in result.tolerances if not r.error))
    assert _broken_marks(check_figures.error_vs_tolerance(clean)) == []


# -- the run report -------------------------------------------------------------------


@pytest.fixture(scope="module")
def run_dir(tmp_path_factory):
    return write_synthetic_run(tmp_path_factory.mktemp("readable") / "run",
                               rng=np.random.default_rng(4), sizes=(500, 1000, 2000, 4000),
                               tolerances=(1e-2, 1e-4, 1e-6), seeds=(0, 1),
                               probes=(16, 64), dense_max_n=2000)


@pytest.fixture(scope="module")
def run_html(run_dir) -> str:
    """The run report without a comparison, rendered once for the tests that read it."""
    return render_report(load_run(run_dir))


def _comparison() -> Comparison:
    return Comparison(baseline="base", new="new", checks=(), paired=3, findings=(),
                      missing=(), extra=())


@pytest.mark.parametrize("with_comparison", [False, True])
def test_table_of_contents_matches_the_sections(run_dir, run_html, with_comparison):
    html = (render_report(load_run(run_dir), comparison=_comparison()) if with_comparison
            else run_html)
    found = outline(html)
    assert len(found.toc) == (9 if with_comparison else 8)
    assert found.toc == [(f"#{sid}", text) for sid, text in found.headings]
    numbers = [int(text.split(".", 1)[0]) for _, text in found.toc]
    assert numbers == list(range(1, len(found.toc) + 1))
    if with_comparison:
        assert found.toc[1] == ("#comparison", "2. Comparison with a baseline")
        # references to other sections follow the numbering
        assert "see the crossover in section 4" in _text(html) or \
            "does not pay" not in _text(html)
        assert "thread settings listed in section 7." in _text(html)


def test_run_report_headers_are_labels_not_results_keys(run_html):
    found = outline(run_html)
    assert found.headers
    raw = [h for h in found.headers if RAW_KEY.match(h)]
    assert raw == [], raw
    for key in ("loglik_abs_err", "param_shift_se_max", "kriging_mean_err_sd_max"):
        assert RESULT_COLUMN_LABELS[key] in found.headers
    # the scaling table names each metric by its label
    assert "t_total" not in _text(run_html).split(
        "Fitted exponents")[1].split("Time to accuracy")[0]


def test_run_report_coordinate_units_from_the_option_or_the_run(run_dir, run_html, tmp_path):
    assert "coordinates and length scales in coordinate units" in _text(run_html)
    out = tmp_path / "r.html"
    assert main(["report", str(run_dir), "--out", str(out), "--coord-units", "km"]) == 0
    assert "coordinates and length scales in km" in _text(out.read_text(encoding="utf-8"))
    assert main(["report", str(run_dir), "--out", str(out), "--coord-units", " "]) == 2


# -- export ---------------------------------------------------------------------------


def test_export_with_two_sizes_writes_its_tables_and_says_why_no_fit(tmp_path, capsys):
    run = tmp_path / "smoke"
    shutil.copytree(SMOKE, run)
    out = tmp_path / "export"
    assert main(["export", str(run), "--to", str(out)]) == 0
    err = capsys.readouterr().err
    reason = "a scaling fit needs at least 3 distinct sizes"
    assert f"covaudit export: No scaling fit: {reason}" in err
    md = (out / "scaling.md").read_text(encoding="utf-8")
    assert md.startswith(f"No scaling fit: {reason}") and md.count(reason) == 1
    # the smoke case: dense and hodlr at two tolerances, at n = 300 and 600 (smoke.toml)
    table = [line for line in md.splitlines() if line.startswith("| ")]
    header, body = table[0], table[1:]
    assert "total time (s)" in header and "t_total" not in header
    results = pd.read_csv(run / "results.csv")
    ok = results[results["status"] == "ok"]
    assert len(body) == ok.groupby(["solver", "tol", "n"], dropna=False).ngroups == 6
    assert {row.split("|")[4].strip() for row in body} == {"300", "600"}
    tex = (out / "scaling.tex").read_text(encoding="utf-8")
    assert r"\begin{tabular}" in tex and reason in tex
    result = export_methods(run, to=tmp_path / "again")
    assert result.notes and reason in result.notes[0]


def test_run_accuracy_figure_marks_a_tolerance_that_only_failed(tmp_path):
    run = write_synthetic_run(tmp_path / "run", rng=np.random.default_rng(4),
                              sizes=(500, 1000), tolerances=(1e-2, 1e-4, 1e-6), seeds=(0, 1),
                              probes=(16,), dense_max_n=2000)
    frame = pd.read_csv(run / "results.csv")
    every = figures.accuracy_vs_tolerance(frame, thresholds=Thresholds())
    assert every is not None and not [
        line for ax in every.get_axes() for line in ax.get_lines()
        if line.get_label() == figures.FAILED_LABEL]
    # every task at tol 1e-2 and n = 1000 fails: nothing is measured there
    broken = (frame["tol"] == 1e-2) & (frame["n"] == 1000)
    frame.loc[broken, "status"] = "failed"
    assert figures.failed_tolerances(frame) == [1e-2]
    fig = figures.accuracy_vs_tolerance(frame, thresholds=Thresholds())
    assert fig is not None
    marks = [[float(x) for x in line.get_xdata()] for ax in fig.get_axes()
             for line in ax.get_lines() if line.get_label() == figures.FAILED_LABEL]
    assert marks == [[1e-2]] * len(fig.get_axes())
