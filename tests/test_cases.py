"""Case files: parsing, validation messages, expansion into tasks with stable keys."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from harness.grid.cases import CaseFileError, case_from_text, load_case, parse_bytes
from harness.grid.cases.shipped import shipped_case_files, shipped_case_text

REPO = Path(__file__).resolve().parents[1]

MINIMAL = """
seeds = [0, 1]
[[pointsets]]
generator = "uniform"
sizes = [100, 200]
dims = [2]
[[kernels]]
family = "matern32"
lengthscale = 0.2
nugget = 1e-3
[[solvers]]
name = "hodlr"
tolerances = [1e-4, 1e-8]
[[solvers]]
name = "dense"
"""


def _case(text: str, tmp_path: Path, name: str = "case.toml"):
    path = tmp_path / name
    path.write_text(text)
    return load_case(path)


def test_minimal_case_expands_to_the_cross_product(tmp_path):
    case = _case(MINIMAL, tmp_path)
    tasks = case.tasks()
    # 2 sizes x (2 hodlr tolerances + 1 dense) x 2 seeds
    assert len(tasks) == 2 * 3 * 2
    assert len({t.key for t in tasks}) == len(tasks)
    assert {t.tol for t in tasks if t.solver == "dense"} == {None}


def test_keys_are_stable_and_depend_on_solver_version(tmp_path):
    first = [t.key for t in _case(MINIMAL, tmp_path).tasks()]
    second = [t.key for t in _case(MINIMAL, tmp_path, "other.toml").tasks()]
    assert first == second  # same parameters, another file: same keys
    task = _case(MINIMAL, tmp_path).tasks()[0]
    from dataclasses import replace
    assert replace(task, solver_version="9.9").key != task.key
    assert replace(task, case="renamed").key == task.key


def test_data_streams_are_shared_across_solvers_and_tolerances(tmp_path):
    tasks = [t for t in _case(MINIMAL, tmp_path).tasks() if t.n == 100 and t.seed == 0]
    draws = {(t.solver, t.tol): t.streams()["points"].random(3).tolist() for t in tasks}
    assert len({tuple(v) for v in draws.values()}) == 1
    other_seed = next(t for t in _case(MINIMAL, tmp_path).tasks() if t.n == 100 and t.seed == 1)
    assert not np.allclose(other_seed.streams()["points"].random(3), draws[("dense", None)])


def test_malformed_toml_reports_line_and_column(tmp_path):
    with pytest.raises(CaseFileError) as info:
        _case('seeds = [0]\n[[pointsets]]\nsizes = [1,,2]\n', tmp_path)
    problem = info.value.problems[0]
    assert (problem.line, problem.column) == (3, 12)
    assert "case.toml:3:12" in str(info.value)


def test_every_problem_is_reported_with_key_path_and_nearest_name(tmp_path):
    text = MINIMAL.replace("lengthscale = 0.2", "lenghtscale = 0.2").replace(
        "seeds = [0, 1]", "seed = [0]\nseeds = [-1]").replace("tolerances = [1e-4, 1e-8]",
                                                             "tolerances = [1e-4, -2]")
    text += '[trace]\nmethod = "hutchpp+"\nprobs = 3\n'
    with pytest.raises(CaseFileError) as info:
        _case(text, tmp_path)
    message = str(info.value)
    paths = {p.key_path for p in info.value.problems}
    assert "seed" in paths and "did you mean 'seeds'" in message
    assert "kernels[0].lenghtscale" in paths and "did you mean 'lengthscale'" in message
    assert "seeds[0]" in paths and "-1" in message
    assert "solvers[0].tolerances[1]" in paths and "-2" in message
    assert "trace.method" in paths and "did you mean 'hutchpp'" in message
    assert "trace.probs" in paths and "did you mean 'probes'" in message
    assert all(p.file.endswith("case.toml") for p in info.value.problems)


def test_unknown_solver_kernel_and_generator_options(tmp_path):
    text = MINIMAL.replace('name = "dense"', 'name = "nosuchsolver"').replace(
        'generator = "uniform"', 'generator = "clustered"\noptions = { spred = 0.1 }').replace(
        'family = "matern32"', 'family = "matern23"')
    with pytest.raises(CaseFileError) as info:
        _case(text, tmp_path)
    message = str(info.value)
    assert "solvers[1].name" in message and "nosuchsolver" in message
    assert "pointsets[0].options.spred" in message and "did you mean 'spread'" in message
    assert "kernels[0].family" in message and "matern32" in message


def test_tensor_grid_sizes_must_be_perfect_powers(tmp_path):
    text = MINIMAL.replace('generator = "uniform"', 'generator = "tensor_grid"').replace(
        "sizes = [100, 200]", "sizes = [100, 120]")
    with pytest.raises(CaseFileError) as info:
        _case(text, tmp_path)
    assert [p.key_path for p in info.value.problems] == ["pointsets[0].sizes[1]"]
    assert "121" in str(info.value)


def test_data_file_point_set(tmp_path):
    rng = np.random.default_rng(0)
    xy = rng.random((50, 2))
    lines = ["x,y,z"] + [f"{a},{b},{a + b}" for a, b in xy]
    (tmp_path / "obs.csv").write_text("\n".join(lines) + "\n")
    text = MINIMAL.replace('generator = "uniform"\nsizes = [100, 200]\ndims = [2]',
                           'file = "obs.csv"\ncolumns = ["x", "y"]\nvalues = "z"\nsizes = [40]')
    case = _case(text, tmp_path)
    task = case.tasks()[0]
    assert (task.n, task.d, task.pointset.value_column) == (40, 2, "z")
    bad = text.replace('columns = ["x", "y"]', 'columns = ["x", "w"]')
    with pytest.raises(CaseFileError, match=r"pointsets\[0\]\.columns\[1\].*'w'"):
        _case(bad, tmp_path)


def test_budget_units():
    assert parse_bytes("4 GiB") == 4 * 2**30
    assert parse_bytes("512MB") == 512 * 10**6
    assert parse_bytes(1000) == 1000
    with pytest.raises(ValueError, match="GiB"):
        parse_bytes("4 parsecs")


@pytest.mark.parametrize("path", sorted((REPO / "cases").glob("*.toml")), ids=lambda p: p.name)
def test_shipped_case_files_validate_and_are_the_package_copy(path):
    case = load_case(path)
    assert case.tasks()
    # One copy: the repository's cases/ is the package's casefiles/ folder.
    assert shipped_case_text(path.stem) == path.read_text()


def test_shipped_case_files_are_listed_through_resources():
    names = set(shipped_case_files())
    assert {"smoke", "scaling-2d", "kernels"} <= names
    assert names == {p.stem for p in (REPO / "cases").glob("*.toml")}
    with pytest.raises(KeyError, match="shipped: "):
        shipped_case_text("no-such-case")


def test_from_text_without_file(tmp_path):
    case = case_from_text(MINIMAL, file="<text>", base=tmp_path, default_name="t")
    assert case.name == "t"


# -- issue 12: version-free pairing key, [timing] timeout, tolerance range -------------

def test_pair_key_ignores_versions_and_execution_settings(tmp_path):
    # Defect 1: the pairing key must survive a version bump (common practice: pair on
    # what the problem is, record versions beside it).
    from dataclasses import replace

    task = _case(MINIMAL, tmp_path).tasks()[0]
    assert replace(task, solver_version="9.9").pair_key == task.pair_key
    assert replace(task, repeats=7, timing_threads=4, timeout=5.0).pair_key == task.pair_key
    for change in (dict(n=task.n + 1), dict(tol=1e-3), dict(seed=5), dict(case="other"),
                   dict(solver_options={"leaf_size": 7}), dict(kernel="gaussian")):
        assert replace(task, **change).pair_key != task.pair_key, change


def test_timing_timeout_reaches_every_task_without_changing_keys(tmp_path):
    plain = _case(MINIMAL, tmp_path).tasks()
    timed = _case(MINIMAL + "[timing]\ntimeout = 42.5\n", tmp_path, "t.toml").tasks()
    assert {t.timeout for t in timed} == {42.5} and {t.timeout for t in plain} == {None}
    assert [t.key for t in timed] == [t.key for t in plain]  # runs stay resumable


@pytest.mark.parametrize("value", ["0", "-1", '"abc"', "1e400", "1e9"])
def test_timing_timeout_is_validated(tmp_path, value):
    with pytest.raises(CaseFileError, match="timing.timeout"):
        _case(MINIMAL + f"[timing]\ntimeout = {value}\n", tmp_path)


@pytest.mark.parametrize("tol", ["1.0", "2.0"])
def test_tolerances_must_lie_below_one(tmp_path, tol):
    with pytest.raises(CaseFileError, match=r"tolerances\[0\]"):
        _case(MINIMAL.replace("tolerances = [1e-4, 1e-8]", f"tolerances = [{tol}]"), tmp_path)


def test_default_timeout_is_generous_and_overridable(tmp_path):
    from dataclasses import replace

    from harness.grid.runner.deadlines import TIMEOUT_FLOOR_SECONDS, task_timeout

    task = _case(MINIMAL, tmp_path).tasks()[0]
    assert task_timeout(task) >= TIMEOUT_FLOOR_SECONDS
    assert task_timeout(replace(task, timeout=9.0)) == 9.0
    assert task_timeout(replace(task, timeout=9.0), override=3.0) == 3.0
    with pytest.raises(ValueError, match="--task-timeout"):
        task_timeout(task, override=-1.0)
