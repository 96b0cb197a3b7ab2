"""The HTML report: self-contained, escaped, deterministic, robust; the run loader."""

from __future__ import annotations

import base64
import json
import re
import shutil
import subprocess
from html import unescape
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from synthetic import write_synthetic_run

from harness.analysis import RunDirError, load_run
from harness.report import render_report, write_report

HOSTILE = "<script>alert(1)</script>"
SMALL = dict(sizes=(500, 1000, 2000, 4000), tolerances=(1e-2, 1e-4, 1e-6), seeds=(0, 1),
             probes=(16, 64), dense_max_n=2000)
CHROMIUM = Path("/usr/bin/chromium")


class _Collector(HTMLParser):
    def __init__(self) -> None:
        super().__init__()
        self.tags: list[str] = []
        self.urls: list[tuple[str, str]] = []
        self.images: list[str] = []

    def handle_starttag(self, tag, attrs):
        self.tags.append(tag)
        for name, value in attrs:
            if name in ("src", "href") and value is not None:
                self.urls.append((name, value))
                if tag == "img" and name == "src":
                    self.images.append(value)


@pytest.fixture(scope="module")
def run_dir(tmp_path_factory):
    return write_synthetic_run(tmp_path_factory.mktemp("report") / "run",
                               rng=np.random.default_rng(4), case=HOSTILE, **SMALL)


@pytest.fixture(scope="module")
def report(run_dir):
    path = write_report(run_dir)
    return path, path.read_text(encoding="utf-8")


def _parse(html: str) -> _Collector:
    parser = _Collector()
    parser.feed(html)
    parser.close()
    return parser


def test_self_contained_without_scripts_or_external_urls(report):
    _, html = report
    parsed = _parse(html)
    assert "script" not in parsed.tags
    for name, value in parsed.urls:
        assert not value.lower().startswith(("http://", "https://", "//")), (name, value)
        assert value.startswith(("#", "data:")) or value == "results.csv", (name, value)


def test_user_strings_are_escaped(report):
    _, html = report
    assert HOSTILE not in html
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in html


def test_figures_are_embedded_and_non_empty(report):
    _, html = report
    images = _parse(html).images
    assert len(images) >= 4
    for uri in images:
        header, payload = uri.split(",", 1)
        assert header == "data:image/svg+xml;base64"
        svg = base64.b64decode(payload)
        assert b"<svg" in svg and len(svg) > 5000


def test_sections_cautions_and_common_practice_note(report):
    _, html = report
    text = re.sub(r"\s+", " ", html)
    for needle in ("Which tolerance is safe?", "loosest safe tolerance", "Fitted exponents",
                   "Stochastic trace estimates", "licensed professional practice",
                   "nothing about whether that model suits", "common practice", "Synthetic CPU",
                   "LinAlgError", "beyond dense limit", "@media print"):
        assert needle in text, needle


def test_render_is_deterministic(run_dir, report):
    _, first = report
    assert render_report(load_run(run_dir)) == first


def test_run_with_only_failures_renders_and_lists_them(tmp_path):
    src = write_synthetic_run(tmp_path / "src", rng=np.random.default_rng(0), **SMALL)
    frame = pd.read_csv(src / "results.csv")
    frame["status"] = "failed"
    frame["error_type"] = "MemoryError"
    frame["error_message"] = "out of memory at n=" + frame["n"].astype(int).astype(str)
    frame.to_csv(src / "results.csv", index=False)
    (src / "timings.csv").unlink()
    html = write_report(src, out=tmp_path / "only_failures.html").read_text()
    _parse(html)
    assert "MemoryError" in html and "out of memory at n=4000" in html
    assert "No compressed-solver task finished" in html
    assert "timings.csv not found" in html


def test_missing_columns_still_render(tmp_path):
    run = tmp_path / "thin"
    run.mkdir()
    pd.DataFrame({"key": ["a", "b", "c"], "solver": ["s"] * 3, "n": [100, 200, 400],
                  "tol": [1e-6] * 3, "status": ["ok"] * 3, "t_total": [1.0, 2.1, 4.3]}
                 ).to_csv(run / "results.csv", index=False)
    (run / "run.json").write_text(json.dumps({"schema_version": 1}))
    html = write_report(run).read_text()
    assert "lacks" in html and "Fitted exponents" in html


def test_loader_names_the_bad_file(tmp_path):
    run = tmp_path / "bad"
    run.mkdir()
    with pytest.raises(RunDirError, match="results.csv"):
        load_run(run)
    (run / "results.csv").write_text("key,status\na,ok\n")
    with pytest.raises(RunDirError, match="run.json"):
        load_run(run)
    (run / "run.json").write_text("{not json")
    with pytest.raises(RunDirError, match=r"run\.json: not valid JSON"):
        load_run(run)
    (run / "run.json").write_text(json.dumps({"schema_version": 99}))
    with pytest.raises(RunDirError, match="newer"):
        load_run(run)


@pytest.mark.skipif(not CHROMIUM.exists() or shutil.which("chromium") is None,
                    reason="headless screenshot needs /usr/bin/chromium "
                           "(Debian: apt-get install chromium)")
def test_headless_chromium_screenshot(report, tmp_path):
    path, _ = report
    png = tmp_path / "report.png"
    cmd = [str(CHROMIUM), "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic",
           "--no-first-run", "--disable-background-networking", "--disable-component-update",
           "--disable-sync", f"--user-data-dir={tmp_path / 'profile'}",
           f"--screenshot={png}", "--window-size=1280,2000", path.resolve().as_uri()]
    subprocess.run(cmd, check=True, capture_output=True, timeout=120)
    data = png.read_bytes()
    assert data[:8] == b"\x89PNG\r\n\x1a\n" and len(data) > 20_000


def test_repeated_notes_collapse_into_one_line_with_a_count():
    # expected values written by hand from the inputs (common practice: group equal text)
    from harness.report.condense import collapse_notes, shorten

    notes = collapse_notes([("dense", "too few sizes"), ("dense", "too few sizes"),
                            ("hodlr tol=1e-04", "too few sizes"), ("", "other")])
    assert [n.count for n in notes] == [3, 1]
    assert notes[0].line() == "too few sizes (3\u00d7: dense, hodlr tol=1e-04)"
    assert notes[1].line() == "other"
    assert shorten("compression lost positive definiteness at level 3", 30) == \
        "compression lost positive\u2026"
    assert shorten("short", 30) == "short"


def test_speedup_below_one_does_not_pay():
    from harness.report.run_summary import speedup_text

    assert speedup_text(0.2) == "0.2\u00d7: does not pay at this size"
    assert speedup_text(3.14159) == "3.14\u00d7 faster"
    assert speedup_text(float("nan")) == "\u2013"


def test_shipped_baseline_report_is_trimmed(tmp_path):
    """The shipped smoke baseline: no internal column warning, one collapsed scaling note,
    a short environment table with the full record folded, a per-dataset summary."""
    src = Path(__file__).resolve().parents[1] / "reference" / "baselines" / "smoke"
    run = tmp_path / "smoke"
    shutil.copytree(src, run)
    html = write_report(run).read_text(encoding="utf-8")
    assert "lacks" not in html and "contract column" not in html
    notes = re.findall(r'<p class="note">(.*?)</p>', html, re.S)
    assert len(notes) == len(set(notes))
    assert sum("a scaling fit needs" in n for n in notes) == 1
    assert "Full environment record</summary>" in html
    assert "Results per dataset" in html and 'href="results.csv"' in html
    assert "does not pay at this size" in html
    assert "No power law is drawn" in html


# --- the check report: answer first, marked failures, one set of labels ---------------

def _check_html(**kw):
    from check_example import example_points, example_result

    from harness.report.check_report import render_check_report

    points, holdout = example_points()
    return render_check_report(example_result(**kw), points=points, holdout=holdout)


def test_check_report_answers_first_with_times_in_seconds():
    html = _check_html()
    text = unescape(re.sub(r"\s+", " ", re.sub(r"<[^>]+>", " ", html)))
    answer = text.index("Recommended tolerance: 1e-6")
    assert answer < text.index("Verdict per tolerance")
    # dense time = compressed time x speed-up = 0.25 s x 3.2 (hand arithmetic)
    assert "3.2× faster than the dense computation: 0.8 s (dense) against 0.25 s" in text
    assert "&lt;b&gt;wells&lt;/b&gt;.csv" in html and "<b>wells</b>" not in html


def test_check_report_says_when_nothing_is_safe_or_nothing_pays():
    text = re.sub(r"\s+", " ", re.sub(r"<[^>]+>", " ", _check_html(recommended=False)))
    assert "No tolerance in the list is safe for these data." in text
    assert "Use the exact computation at this size" in text
    slow = re.sub(r"\s+", " ", re.sub(r"<[^>]+>", " ", _check_html(slow=True)))
    assert "does not pay at this size" in slow


def test_check_report_marks_the_failing_metric_and_shows_breakdowns_whole_once():
    from check_example import BREAKDOWN

    html = _check_html()
    rows = re.findall(r'<tr class="(safe|unsafe|unresolved)">(.*?)</tr>', html, re.S)
    unsafe = [body for cls, body in rows if cls == "unsafe"]
    assert len(unsafe) == 2
    # the 1e-2 row fails the log-likelihood limit: that cell, and only it, is marked
    marked = re.findall(r'<td class="fail">(.*?)</td>', unsafe[0], re.S)
    assert len(marked) == 1 and "\u2718" in unescape(marked[0]) and "2.6" in marked[0]
    # the breakdown row shows the whole message across the metric columns, and nowhere else
    assert BREAKDOWN in unsafe[1] and "\u2026" not in unsafe[1]
    assert html.count(BREAKDOWN) == 1
    unresolved = [body for cls, body in rows if cls == "unresolved"][0]
    assert re.search(r'<td class="unresolved">\? 0\.09', unresolved)


def test_check_report_uses_one_set_of_labels_with_a_legend():
    from harness.report.labels import COLUMN_LABELS, METRIC_LABELS

    html = _check_html()
    for key in ("loglik_error", "param_shift_se", "kriging_mean_sd", "mloe", "mmom",
                "microergodic_shift_se"):
        label = METRIC_LABELS[key]
        assert f"<th>{label.short}" in html.replace("&#39;", "'")
        assert (f"<dt>{label.short}</dt><dd>{label.label}: {label.legend} "
                f"<code>{key}</code></dd>") in html.replace("&#39;", "'")
    for key in ("tol", "seconds", "speedup"):
        assert f"<dt>{COLUMN_LABELS[key].short}</dt>" in html
    assert "the documentation" not in html
    for term in ("DPOT01", "Hutch++", "MLOE", "MMOM", "microergodic"):
        assert term in html


def test_check_report_figures_are_embedded_with_alt_text_and_notes_are_unique():
    html = _check_html()
    parsed = _parse(html)
    assert len(parsed.images) == 3  # errors, speed-up, map
    assert all(u.startswith("data:image/svg+xml;base64,") for u in parsed.images)
    assert len(re.findall(r'<img src="data:[^"]+" alt="[^"]{40,}"', html)) == 3
    assert "script" not in parsed.tags
    notes = re.findall(r"<li>(.*?)</li>", html, re.S)
    assert len(notes) == len(set(notes))
    assert sum("Hutch++" in n and "Fisher" in n for n in notes) == 1


def test_terminal_and_readme_use_the_report_labels():
    from harness.report.labels import COLUMN_LABELS, METRIC_LABELS, TERMS

    readme = (Path(__file__).resolve().parents[1] / "README.md").read_text()
    for m in [*METRIC_LABELS.values(), *COLUMN_LABELS.values()]:
        assert f"**{m.label}** (`{m.key}`): {m.legend}." in readme, m.key
    for term in TERMS:
        assert f"**{term}**" in readme


def test_terminal_summary_uses_the_same_labels_and_keeps_words_whole():
    from check_example import BREAKDOWN, example_result

    from harness.cli.check_command import summary
    from harness.report.labels import METRIC_LABELS

    text = summary(example_result())
    for key in ("loglik_error", "param_shift_se", "kriging_mean_sd", "mloe", "mmom"):
        assert METRIC_LABELS[key].short in text
    assert "dL (nat)" not in text and "shift/SE" not in text
    row = next(line for line in text.splitlines() if line.strip().startswith("1e-03"))
    assert row.rstrip().endswith("\u2026 [1]") and " of the\u2026" in row
    assert f"[1] tol 1e-03: {BREAKDOWN}" in text
    # dense time = 0.25 s x 3.2 = 0.8 s (hand arithmetic)
    assert "0.8 s against 0.25 s" in text


def test_terminal_recommendation_below_one_reads_as_slower_not_faster():
    from check_example import example_result

    from harness.cli.check_command import summary
    from harness.report.run_summary import DOES_NOT_PAY

    # speed-up at the pick 3.2 x 0.3 = 0.96 (hand arithmetic): the dense evaluation is faster
    line = next(x for x in summary(example_result(slow=True)).splitlines()
                if "recommendation:" in x)
    assert "faster" not in line
    assert "speed-up 0.96x: slower than dense" in line and DOES_NOT_PAY in line
