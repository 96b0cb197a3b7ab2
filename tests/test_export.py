"""Methods-section export: LaTeX/Markdown table, PDF/SVG figures, paragraph from the data."""

from __future__ import annotations

import argparse
import re
import xml.etree.ElementTree as ET

import numpy as np
import pandas as pd
import pytest
from synthetic import write_synthetic_run

from harness.analysis import load_run
from harness.analysis.scaling_table import scaling_rows
from harness.cli import export_command as export_cli
from harness.report.export import latex_escape, methods_paragraph, to_latex, to_markdown

SMALL = dict(sizes=(500, 1000, 2000, 4000), tolerances=(1e-4, 1e-6), seeds=(0,),
             probes=(16, 64))


@pytest.fixture(scope="module")
def exported(tmp_path_factory):
    base = tmp_path_factory.mktemp("export")
    run = write_synthetic_run(base / "run", rng=np.random.default_rng(7), **SMALL)
    parser = argparse.ArgumentParser()
    export_cli.add_parser(parser.add_subparsers())
    code = export_cli.run(parser.parse_args(["export", str(run), "--to", str(base / "out")]))
    return run, base / "out", code


def test_files_written(exported):
    _, out, code = exported
    assert code == 0
    names = {p.name for p in out.iterdir()}
    assert {"scaling.tex", "scaling.md", "methods.txt"} <= names
    for stem in ("accuracy", "time_vs_n", "memory_vs_n", "trace_vs_probes"):
        assert (out / f"{stem}.pdf").read_bytes()[:5] == b"%PDF-"
        root = ET.fromstring((out / f"{stem}.svg").read_bytes())
        assert root.tag.endswith("svg")
        assert b"<dc:date>" not in (out / f"{stem}.svg").read_bytes()  # no timestamp


def test_latex_table_is_booktabs_and_escaped(exported):
    _, out, _ = exported
    tex = (out / "scaling.tex").read_text()
    for rule in (r"\toprule", r"\midrule", r"\bottomrule"):
        assert tex.count(rule) == 1
    # special characters escaped (R squared), metrics named by their labels, not keys
    assert r"R\textsuperscript{2}" in tex and "factor time (s)" in tex
    assert "t_factor" not in tex and r"t\_factor" not in tex


def test_markdown_table_has_one_line_per_fit(exported):
    run, out, _ = exported
    fitted = [r for r in scaling_rows(load_run(run), rng=0) if r.fit is not None]
    lines = (out / "scaling.md").read_text().strip().splitlines()
    assert len(lines) == len(fitted) + 2


def test_paragraph_is_written_from_the_results(exported, tmp_path):
    run, out, _ = exported
    text = (out / "methods.txt").read_text()
    assert "Synthetic CPU" in text and "n = 500, 1000, 2000 and 4000" in text
    fit = next(r.fit for r in scaling_rows(load_run(run), rng=0)
               if r.solver == "hodlr" and r.tol == 1e-4 and r.metric == "t_factor")
    assert f"b = {fit.slope:.2f} [{fit.ci_low:.2f}, {fit.ci_high:.2f}]" in text
    # Change the planted exponent: the paragraph follows the data.
    other = write_synthetic_run(tmp_path / "steeper", rng=np.random.default_rng(7),
                                hodlr_exponent=1.9, **SMALL)
    rows = scaling_rows(load_run(other), rng=0)
    slopes = [float(m) for m in re.findall(r"hodlr tol=1e-04, factorization: b = ([0-9.]+)",
                                           methods_paragraph(load_run(other), rows))]
    assert slopes and slopes[0] == pytest.approx(2.0, abs=0.1)


def test_latex_escape_and_markdown_pipes():
    assert latex_escape("a_b & 50% $x$ #1 {y} ~^\\") == (
        r"a\_b \& 50\% \$x\$ \#1 \{y\} \textasciitilde{}\textasciicircum{}\textbackslash{}")
    table = pd.DataFrame({"a|b": ["x|y"]})
    assert to_markdown(table).splitlines()[2] == r"| x\|y |"
    assert r"\caption{c\_1}" in to_latex(table, caption="c_1", label="t")
