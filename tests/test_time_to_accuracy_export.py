"""Time to accuracy of a real two-solver ``run``: the exported tables and figures, the
figure's axes and lines, and the run report's section.

One ``covaudit run`` per module: hodlr at tol 1e-2 and 1e-6, vecchia at 10 and 40
neighbours, n = 200, 400, 800, one seed. What each table row must say is derived here
from the run's own ``results.csv`` (which knob values meet the limit, and the cheapest of
them), never copied from the analysis under test.
"""

from __future__ import annotations

import argparse
import base64
import math
import re
import xml.etree.ElementTree as ET
from pathlib import Path

import pandas as pd
import pytest

from harness.analysis.load import load_run
from harness.analysis.time_to_accuracy import time_to_accuracy
from harness.audit.metric_names import LOGLIK_ERR_NAT
from harness.audit.rule import Thresholds
from harness.cli import export_command as export_cli
from harness.cli import run_command as run_cli
from harness.infra.exit_codes import ExitCode
from harness.report.time_to_accuracy_figure import time_to_accuracy_figure

SIZES = (200, 400, 800)
SOLVERS = ("hodlr", "vecchia")
LIMIT = Thresholds().loglik_nats          # the default log-likelihood limit, 0.1 nat
CASE = """
name = "time-to-accuracy"
description = "two solvers, two knob values each, three sizes, one seed"
seeds = [0]

[[pointsets]]
generator = "uniform"
sizes = [200, 400, 800]
dims = [2]

[[kernels]]
family = "matern32"
variance = 1.0
lengthscale = 0.2
nugget = 1e-3

[mean]
models = ["constant"]

[[solvers]]
name = "hodlr"
knob_values = [1e-2, 1e-6]
options = { leaf_size = 64 }

[[solvers]]
name = "vecchia"
knob_values = [10, 40]

[trace]
method = "exact"

[metrics]
compute = ["loglik"]

[timing]
repeats = 1
warmup = 0
"""


def _verb(module, argv: list[str]) -> int:
    parser = argparse.ArgumentParser()
    module.add_parser(parser.add_subparsers(dest="verb"))
    return module.run(parser.parse_args(argv))


@pytest.fixture(scope="module")
def exported(tmp_path_factory) -> tuple[Path, Path]:
    base = tmp_path_factory.mktemp("time_to_accuracy")
    case = base / "case.toml"
    case.write_text(CASE)
    run = base / "run"
    # hodlr at tol 1e-2 breaks down on this case at n = 400 and 800 (failed tasks, exit
    # code 3): those points are chosen among the other knob value; never a harness error
    assert _verb(run_cli, ["run", str(case), "--out", str(run)]) in (
        ExitCode.OK, ExitCode.FINDING, ExitCode.SOLVER_FAILED)
    assert _verb(export_cli, ["export", str(run), "--to", str(base / "out")]) == ExitCode.OK
    return run, base / "out"


def _expected(run: Path, limit: float = LIMIT) -> dict[tuple[str, int], str]:
    """Each (solver, n)'s knob text from results.csv: the cheapest t_total among the
    finished tasks with |loglik_err_nat| <= limit, or ``not reached at n = N``."""
    results = pd.read_csv(run / "results.csv")
    out = {}
    for (solver, n), tasks in results.groupby(["solver", "n"]):
        meets = tasks[(tasks["status"] == "ok") & (tasks[LOGLIK_ERR_NAT].abs() <= limit)]
        if meets.empty:
            out[(solver, int(n))] = f"not reached at n = {int(n)}"
        else:
            best = meets.sort_values("t_total").iloc[0]
            out[(solver, int(n))] = f"{best['knob_name']} = {best['knob_value']:g}"
    return out


def test_the_run_covers_both_solvers_at_every_size(exported):
    run, _ = exported
    expected = _expected(run)
    assert set(expected) == {(s, n) for s in SOLVERS for n in SIZES}
    # the case holds both outcomes, so neither kind of row is checked on zero items:
    # vecchia with 40 neighbours misses 0.1 nat at n = 800 (0.22 nat measured on this case)
    assert expected[("vecchia", 800)] == "not reached at n = 800"
    assert sum(not text.startswith("not reached") for text in expected.values()) >= 4


def _markdown_rows(text: str) -> dict[tuple[str, int], list[str]]:
    rows = {}
    for line in text.splitlines():
        cells = [c.strip() for c in line.strip("|").split("|")]
        if cells[0] in SOLVERS and cells[1].isdigit():
            rows[(cells[0], int(cells[1]))] = cells
    return rows


def test_markdown_table_lists_each_solvers_knob_value_per_n(exported):
    run, out = exported
    rows = _markdown_rows((out / "time_to_accuracy.md").read_text(encoding="utf-8"))
    expected = _expected(run)
    assert set(rows) == set(expected)
    for key, text in expected.items():
        knob, seconds = rows[key][2], rows[key][3]
        assert knob == text, key
        assert (seconds == "\u2013") == text.startswith("not reached"), key


def test_latex_tables_list_each_solvers_knob_value_per_n(exported):
    run, out = exported
    tex = (out / "time_to_accuracy.tex").read_text(encoding="utf-8")
    assert tex.count(r"\begin{table}") == 2 and tex.count(r"\toprule") == 2
    assert r"$\leq$ 0.1" in tex and "\u2264" not in tex          # escaped for LaTeX
    for (solver, n), text in _expected(run).items():
        assert re.search(rf"^{solver} & {n} & {re.escape(text)} & ", tex, re.MULTILINE), (
            solver, n, text)
    # the fits' table: one row per solver, vecchia's naming the size it missed
    fit_rows = [line for line in tex.splitlines() if line.startswith(SOLVERS)
                and " & " in line and not re.match(r"^\w+ & \d+ & ", line)]
    assert [row.split(" & ")[0] for row in fit_rows] == list(SOLVERS)
    assert fit_rows[1].split(" & ")[5] == "800"


def test_pdf_and_svg_figures_exist_and_name_both_solvers(exported):
    _, out = exported
    assert (out / "time_to_accuracy.pdf").read_bytes()[:5] == b"%PDF-"
    svg = (out / "time_to_accuracy.svg").read_bytes()
    assert ET.fromstring(svg).tag.endswith("svg")
    # text is drawn as paths (harness.report.style); matplotlib keeps each string as a
    # comment beside its glyphs
    for solver in SOLVERS:
        assert f"<!-- {solver}".encode() in svg, solver
    assert b"not reached at n = 800" in svg


def test_figure_has_labelled_axes_with_units_and_one_line_per_solver(exported):
    run, _ = exported
    result = time_to_accuracy(load_run(run), limit=LIMIT)
    fig = time_to_accuracy_figure(result)
    assert fig is not None
    (ax,) = fig.axes
    assert ax.get_xlabel() == "problem size n (points)"
    assert ax.get_ylabel() == "time to accuracy (s)"
    assert ax.get_xscale() == ax.get_yscale() == "log"
    labelled = [line for line in ax.get_lines() if not line.get_label().startswith("_")]
    assert [line.get_label().split(":")[0].split(";")[0] for line in labelled] == list(
        SOLVERS)
    reached = {s.solver: [p.n for p in s.points if p.reached] for s in result.series}
    for line, solver in zip(labelled, SOLVERS, strict=True):
        assert list(line.get_xdata()) == reached[solver]           # measured sizes only
        assert all(math.isfinite(y) for y in line.get_ydata())
    legend = [t.get_text() for t in ax.get_legend().get_texts()]
    assert len(legend) == 2 and legend[1].endswith("not reached at n = 800")


def test_run_report_holds_the_section_with_its_figure(exported):
    run, _ = exported
    html = (run / "report.html").read_text(encoding="utf-8")      # written by `run`
    start = html.index('id="time-to-accuracy"')
    section = html[start:html.index("</section>", start)]
    images = re.findall(r'<img src="data:image/svg\+xml;base64,([^"]+)"', section)
    assert len(images) == 1
    svg = base64.b64decode(images[0])
    assert all(f"<!-- {solver}".encode() in svg for solver in SOLVERS)
    assert "not reached at n = 800" in section
    for (solver, n), text in _expected(run).items():
        assert re.search(rf"<td>{solver}</td>\s*<td>{n}</td>\s*<td>{re.escape(text)}</td>",
                         section), (solver, n, text)


def test_export_takes_the_limit_from_the_command_line(exported, tmp_path):
    run, _ = exported
    # at 1 nat vecchia with 40 neighbours meets the limit at n = 800 (0.22 nat measured)
    loose = _expected(run, limit=1.0)
    assert loose != _expected(run) and not any(
        text.startswith("not reached") for text in loose.values())
    assert _verb(export_cli, ["export", str(run), "--to", str(tmp_path),
                              "--loglik-nats", "1"]) == ExitCode.OK
    rows = _markdown_rows((tmp_path / "time_to_accuracy.md").read_text(encoding="utf-8"))
    assert {key: cells[2] for key, cells in rows.items()} == loose


def test_export_refuses_a_limit_that_is_not_positive_in_one_line(exported, tmp_path,
                                                                capsys):
    run, _ = exported
    with pytest.raises(SystemExit) as stop:
        _verb(export_cli, ["export", str(run), "--to", str(tmp_path), "--loglik-nats", "0"])
    assert stop.value.code == 2                       # argparse's usage error
    lines = capsys.readouterr().err.strip().splitlines()
    assert "--loglik-nats" in lines[-1] and not any(tmp_path.iterdir())
