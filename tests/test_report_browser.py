"""The reports in a real browser at 1280 px: the answer and the speed-up are visible
without horizontal scrolling, every figure has alt text, no note line is repeated, no
shown table cell is cut off (by the window or a scrolling box), and the run report's
table of contents matches its section headings.

Headless Chromium loads a copy of each report with a measuring script added (the
reports themselves hold no script); the script writes element positions
(``getBoundingClientRect``) into the page, which ``--dump-dom`` returns. A screenshot of
each report is written too (kept under ``COVAUDIT_SCREENSHOTS`` when that is set, for a
person to look at). Skipped with a reason only when Chromium is missing.
"""

from __future__ import annotations

import json
import os
import re
import shutil
import subprocess
from html import unescape
from pathlib import Path

import numpy as np
import pytest
from check_example import example_points, example_result
from synthetic import write_synthetic_run

from harness.report import write_report
from harness.report.check_report import render_check_report

WIDTH = 1280
CHROMIUM = next((p for p in (shutil.which("chromium"), "/usr/bin/chromium",
                             shutil.which("chromium-browser"), shutil.which("google-chrome"))
                 if p and Path(p).exists()), None)

pytestmark = pytest.mark.skipif(CHROMIUM is None, reason="needs a Chromium browser "
                                "(Debian: apt-get install chromium)")

MEASURE = """
<script>
(function () {
  function box(sel) {
    var el = document.querySelector(sel);
    if (!el) { return null; }
    var r = el.getBoundingClientRect();
    return {left: r.left, right: r.right, top: r.top, bottom: r.bottom,
            width: r.width, text: el.textContent.trim().slice(0, 200)};
  }
  var wanted = %s;
  var out = {viewport: window.innerWidth,
             scrollWidth: document.documentElement.scrollWidth, boxes: {}};
  wanted.forEach(function (sel) { out.boxes[sel] = box(sel); });
  var cols = document.querySelectorAll("#verdict-table thead th");
  out.lastHeader = cols.length ? box("#verdict-table thead th:last-child") : null;
  var pre = document.createElement("pre");
  pre.id = "covaudit-measure";
  pre.textContent = JSON.stringify(out);
  document.body.appendChild(pre);
})();
</script>
"""


def _browser(args: list[str], profile: Path) -> subprocess.CompletedProcess:
    cmd = [str(CHROMIUM), "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic",
           "--no-first-run", "--disable-background-networking", "--disable-component-update",
           "--disable-sync", "--hide-scrollbars", f"--user-data-dir={profile}",
           f"--window-size={WIDTH},2400", *args]
    return subprocess.run(cmd, check=True, capture_output=True, timeout=180, text=True)


def measure(html: str, selectors: list[str], tmp: Path) -> dict:
    page = tmp / "measure.html"
    page.write_text(html.replace("</body>", MEASURE % json.dumps(selectors) + "</body>"),
                    encoding="utf-8")
    dom = _browser(["--virtual-time-budget=5000", "--dump-dom", page.as_uri()],
                   tmp / "profile").stdout
    found = re.search(r'<pre id="covaudit-measure">(.*?)</pre>', dom, re.S)
    assert found, "the measuring script did not run"
    return json.loads(found.group(1).replace("&quot;", '"').replace("&amp;", "&"))


def screenshot(path: Path, name: str, tmp: Path) -> Path:
    keep = os.environ.get("COVAUDIT_SCREENSHOTS")
    folder = Path(keep) if keep else tmp
    folder.mkdir(parents=True, exist_ok=True)
    png = folder / f"{name}.png"
    _browser([f"--screenshot={png}", path.resolve().as_uri()], tmp / "profile-shot")
    data = png.read_bytes()
    assert data[:8] == b"\x89PNG\r\n\x1a\n" and len(data) > 20_000
    return png


def _visible(box: dict | None, viewport: float) -> None:
    assert box is not None, "element missing"
    assert box["width"] > 0 and box["left"] >= 0 and box["right"] <= viewport, box


def _alt_texts(html: str) -> list[str]:
    imgs = re.findall(r"<img\b[^>]*>", html)
    assert imgs
    alts = [re.search(r'\balt="([^"]*)"', tag) for tag in imgs]
    assert all(a is not None and len(a.group(1).strip()) >= 20 for a in alts), imgs
    return [a.group(1) for a in alts if a is not None]


def _notes(html: str) -> list[str]:
    lines = re.findall(r'<p class="note">(.*?)</p>', html, re.S)
    lines += re.findall(r"<li>(.*?)</li>", html, re.S)
    return [re.sub(r"\s+", " ", n).strip() for n in lines]


def test_check_report_answer_and_speedup_fit_1280_px(tmp_path):
    points, holdout = example_points()
    html = render_check_report(example_result(), points=points, holdout=holdout)
    path = tmp_path / "check.html"
    path.write_text(html, encoding="utf-8")
    m = measure(html, ["#recommendation", "#speedup", "#verdict-table"], tmp_path)
    assert m["viewport"] == WIDTH
    assert m["scrollWidth"] <= WIDTH, "the page scrolls sideways"
    _visible(m["boxes"]["#recommendation"], WIDTH)
    _visible(m["boxes"]["#speedup"], WIDTH)
    assert "Recommended tolerance: 1e-6" in m["boxes"]["#recommendation"]["text"]
    assert "3.2" in m["boxes"]["#speedup"]["text"]
    # the whole verdict table, speed-up column included, is inside the window
    _visible(m["boxes"]["#verdict-table"], WIDTH)
    assert m["lastHeader"]["text"] == "speed-up"
    _visible(m["lastHeader"], WIDTH)
    assert len(_alt_texts(html)) == 3
    notes = _notes(html)
    assert len(notes) == len(set(notes))
    screenshot(path, "check_report", tmp_path)


def test_run_report_answer_fits_1280_px(tmp_path):
    run = write_synthetic_run(tmp_path / "run", rng=np.random.default_rng(4),
                              sizes=(500, 1000, 2000, 4000), tolerances=(1e-2, 1e-4, 1e-6),
                              seeds=(0, 1), probes=(16, 64), dense_max_n=2000)
    path = write_report(run)
    html = path.read_text(encoding="utf-8")
    m = measure(html, ["#recommendation table", "#recommendation th:nth-child(4)",
                       "#summary h2"], tmp_path)
    assert m["scrollWidth"] <= WIDTH, "the page scrolls sideways"
    _visible(m["boxes"]["#recommendation table"], WIDTH)
    header = m["boxes"]["#recommendation th:nth-child(4)"]
    assert header["text"] == "speed-up"
    _visible(header, WIDTH)
    assert len(_alt_texts(html)) >= 4
    notes = _notes(html)
    assert len(notes) == len(set(notes))
    screenshot(path, "run_report", tmp_path)


CELLS = """
<script>
(function () {
  // every shown table cell must lie inside the window and inside any box that clips it
  var out = {viewport: window.innerWidth, cells: 0, cut: [], toc: [], headings: []};
  document.querySelectorAll("td, th").forEach(function (cell) {
    var folded = cell.closest("details");
    if (folded && !folded.open) { return; }
    var r = cell.getBoundingClientRect();
    if (r.width === 0 && r.height === 0) { return; }
    out.cells += 1;
    var left = 0, right = window.innerWidth;
    for (var p = cell.parentElement; p; p = p.parentElement) {
      if (getComputedStyle(p).overflowX !== "visible") {
        var b = p.getBoundingClientRect();
        left = Math.max(left, b.left);
        right = Math.min(right, b.right);
      }
    }
    if (r.left < left - 0.5 || r.right > right + 0.5 || cell.scrollWidth > cell.clientWidth + 1) {
      out.cut.push({text: cell.textContent.trim().slice(0, 80), left: r.left,
                    right: r.right, clip: [left, right]});
    }
  });
  document.querySelectorAll("nav a").forEach(function (a) {
    out.toc.push([a.getAttribute("href"), a.textContent.trim()]);
  });
  document.querySelectorAll("section[id] > h2").forEach(function (h) {
    out.headings.push(["#" + h.parentElement.id, h.textContent.trim()]);
  });
  var pre = document.createElement("pre");
  pre.id = "covaudit-measure";
  pre.textContent = JSON.stringify(out);
  document.body.appendChild(pre);
})();
</script>
"""


def measure_cells(html: str, tmp: Path) -> dict:
    """Every shown table cell's box against the window and its clipping boxes, the table
    of contents and the section headings, as the browser lays them out at 1280 px."""
    page = tmp / "cells.html"
    page.write_text(html.replace("</body>", CELLS + "</body>"), encoding="utf-8")
    dom = _browser(["--virtual-time-budget=5000", "--dump-dom", page.as_uri()],
                   tmp / "profile-cells").stdout
    found = re.search(r'<pre id="covaudit-measure">(.*?)</pre>', dom, re.S)
    assert found, "the measuring script did not run"
    return json.loads(unescape(found.group(1)))


def test_check_report_cells_are_whole_at_1280_px(tmp_path):
    from test_report_readability import _seed_breakdown

    points, holdout = example_points()
    html = render_check_report(_seed_breakdown(example_result()), points=points,
                               holdout=holdout, coord_units="m")
    m = measure_cells(html, tmp_path)
    assert m["viewport"] == WIDTH
    assert m["cells"] > 40, m["cells"]          # the verdict, parameter and legend tables
    assert m["cut"] == [], m["cut"]


def test_run_report_cells_are_whole_and_contents_match_sections_at_1280_px(tmp_path):
    from harness.analysis.regression import Comparison

    run = write_synthetic_run(tmp_path / "run", rng=np.random.default_rng(4),
                              sizes=(500, 1000, 2000, 4000), tolerances=(1e-2, 1e-4, 1e-6),
                              seeds=(0, 1), probes=(16, 64), dense_max_n=2000)
    comparison = Comparison(baseline="base", new="new", checks=(), paired=3, findings=(),
                            missing=(), extra=())
    for compared in (None, comparison):
        path = write_report(run, out=tmp_path / "report.html", comparison=compared)
        m = measure_cells(path.read_text(encoding="utf-8"), tmp_path)
        assert m["cells"] > 40, m["cells"]
        assert m["cut"] == [], m["cut"]
        assert len(m["toc"]) == (8 if compared is None else 9)
        assert [tuple(t) for t in m["toc"]] == [tuple(h) for h in m["headings"]]
