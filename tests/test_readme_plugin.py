"""The README's plugin guide as written: its code is the example plugin's file, the code
runs and meets the protocol, its commands audit the plugin, and its exit-code table is
harness/infra/exit_codes.py's.

Sources: numpy.linalg.slogdet and numpy.linalg.solve for the factorization's numbers;
the plugin's closed form Sigma~ = Sigma + tol s2 I (examples/jittered_solver/README.md);
the verdicts quoted in the README come from running its command (tiny n, the demo's true
parameters, so deterministic).
"""

from __future__ import annotations

import json
import os
import re
import shlex
import subprocess
import sys
import types
from pathlib import Path

import numpy as np
import pytest

from harness.check.demo_data import generate_demo
from harness.cli import main
from harness.infra.exit_codes import ExitCode
from harness.model.kernels import make_kernel
from harness.solvers.knobs import knob_of
from harness.solvers.protocol import Factorization, SymmetricFactorization

ROOT = Path(__file__).resolve().parents[1]
README = (ROOT / "README.md").read_text(encoding="utf-8")
EXAMPLE = ROOT / "examples" / "jittered_solver"


def _section(title: str) -> str:
    start = README.index(f"\n## {title}\n")
    end = README.find("\n## ", start + 1)
    return README[start:end if end > 0 else None]


def _blocks(section: str, language: str) -> list[str]:
    return re.findall(rf"```{language}\n(.*?)```", section, re.S)


def _guide_code() -> str:
    blocks = _blocks(_section("Use your own solver"), "python")
    assert len(blocks) == 1, "the plugin guide holds one python block"
    return blocks[0]


def _guide_commands() -> list[list[str]]:
    blocks = _blocks(_section("Use your own solver"), "bash")
    assert len(blocks) == 1, "the plugin guide holds one bash block"
    text = blocks[0].replace("\\\n", " ")
    return [shlex.split(line) for line in text.splitlines() if line.strip()]


def test_guide_code_is_the_example_file():
    assert _guide_code() == (EXAMPLE / "jittered_solver" / "solver.py").read_text()


def test_guide_code_runs_and_meets_the_protocol():
    module = types.ModuleType("readme_plugin")
    exec(compile(_guide_code(), "README.md", "exec"), module.__dict__)
    factorize = module.factorize
    rng = np.random.default_rng(7)
    points = rng.uniform(size=(80, 2))
    kernel = make_kernel("matern32", {"variance": 2.0, "lengthscale": 0.3, "nugget": 0.01})
    fac = factorize(points, kernel, kernel.theta, tol=1e-3)
    assert isinstance(fac, Factorization) and isinstance(fac, SymmetricFactorization)
    sigma = kernel.covariance(points) + 1e-3 * 2.0 * np.eye(80)   # Sigma + tol s2 I
    b = rng.standard_normal((80, 3))
    assert fac.n == 80 and fac.nbytes > 0
    assert fac.logdet() == pytest.approx(np.linalg.slogdet(sigma)[1], rel=1e-12)
    np.testing.assert_allclose(fac.solve(b), np.linalg.solve(sigma, b), rtol=1e-8)
    np.testing.assert_allclose(fac.matvec(b[:, 0]), sigma @ b[:, 0], rtol=1e-12)
    knob = knob_of(factorize)
    assert (knob.name, knob.range_text(), knob.more_accurate) == ("tol", "(0, 0.1]",
                                                                  "smaller")
    with pytest.raises(TypeError, match="no options"):
        factorize(points, kernel, kernel.theta, tol=1e-3, leaf_size=64)


def test_guide_knob_refusal_is_as_quoted(tmp_path, capsys, monkeypatch):
    quoted = re.search(r"exits 2 with `(--knob-values: [^`]+)`",
                       " ".join(_section("Use your own solver").split()))
    assert quoted, "the guide quotes the refusal"
    data = tmp_path / "d.csv"
    generate_demo(n=50).frame.to_csv(data, index=False)
    monkeypatch.syspath_prepend(str(EXAMPLE))
    code = main(["check", str(data), "--coords", "easting_m,northing_m", "--value", "vwc",
                 "--solver", "jittered_solver:factorize", "--knob-values", "0.5"])
    assert code == ExitCode.ERROR
    assert quoted.group(1) in capsys.readouterr().err


def test_guide_commands_audit_the_example_plugin(tmp_path):
    demo, check = _guide_commands()
    assert demo[:2] == ["covaudit", "demo"] and check[1:3] == ["covaudit", "check"]
    n = int(demo[demo.index("--n") + 1])
    assert n <= 400, "the guide's example stays tiny"
    # The demo command's data file, as `covaudit demo --n N` writes it (demo_command.py),
    # without its own check of the built-in solver.
    data = tmp_path / check[3]
    data.parent.mkdir(parents=True)
    data.write_text(generate_demo(n=n).frame.to_csv(index=False))
    (tmp_path / "examples").symlink_to(ROOT / "examples")
    env_name, _, env_value = check[0].partition("=")
    env = {**os.environ, env_name: env_value}
    done = subprocess.run([sys.executable, "-m", "harness", *check[2:]], cwd=tmp_path, env=env,
                          capture_output=True, text=True, timeout=600)
    assert done.returncode == ExitCode.OK, done.stderr[-2000:]
    out = tmp_path / check[check.index("--out") + 1]
    result = json.loads((out / "check.json").read_text())
    status = {row["tol"]: row["status"] for row in result["tolerances"]}
    # Quoted in the README: 1e-2 unsafe, the tighter values safe, recommendation 1e-4.
    assert status == {1e-2: "unsafe", 1e-4: "safe", 1e-6: "safe", 1e-8: "safe"}
    assert result["recommended_tolerance"] == 1e-4
    assert (out / "check.html").exists()


def test_exit_code_table_matches_exit_codes():
    rows = re.findall(r"^\| (\d+) \| `([A-Z_]+)` \| (.+) \|$", _section("Exit codes"), re.M)
    assert [(int(code), name) for code, name, _ in rows] == \
        [(int(member), member.name) for member in ExitCode]
    assert "the first of 130, 2, 3, 1, 0 wins" in " ".join(_section("Exit codes").split())
