"""``check`` and ``run`` judge through one engine function and agree on the same data.

The committed file ``fixtures/agree/field240.csv`` (240 points in the unit square, one
draw of a Matern 3/2 field with a constant mean) is audited twice through the command
line: ``run`` on a one-task case file that reads the file, and ``check`` on the same file
with ``--params`` fixed to the case's parameters, the same tolerance, seed (hence the
same solver seed, kriging holdout and probes), holdout size, probes and reference, both
with one BLAS thread as a ``run`` worker has. The engine's metric values, uncertainties
and verdicts must be identical. A second test
patches the engine's entry (``harness.audit.engine.audit_tolerances``) and sees both
verbs call it: ``check`` in process, ``run`` through the job function its workers run
(``harness.grid.runner.jobs.execute``).
"""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from harness.audit import engine
from harness.cli import main

DATA = Path(__file__).parent / "fixtures" / "agree" / "field240.csv"
N = 240
TOL = 1e-4
SEED = 3
HOLDOUT = 0.1            # check --holdout; the case file's holdout is the same count
PROBES = 8
PARAMS = {"variance": 1.0, "lengthscale": 0.2, "nugget": 0.01}
JUDGED = ("loglik_error", "param_shift_se", "kriging_mean_sd")


def _case(tmp_path: Path) -> Path:
    case = tmp_path / "agree.toml"
    case.write_text(f"""
name = "agree"
seeds = [{SEED}]

[[pointsets]]
file = "{DATA.as_posix()}"
columns = ["east", "north"]
values = "value"
sizes = [{N}]

[[kernels]]
family = "matern32"
variance = {PARAMS["variance"]}
lengthscale = {PARAMS["lengthscale"]}
nugget = {PARAMS["nugget"]}

[mean]
models = ["constant"]

[[solvers]]
name = "hodlr"
tolerances = [{TOL!r}]
options = {{ leaf_size = 128 }}

[trace]
probes = {PROBES}

[metrics]
holdout = {round(HOLDOUT * N)}

[timing]
enabled = false

[reference]
order = ["dense"]
""")
    return case


def _check_args(out: Path) -> list[str]:
    """The check of the same data and settings, writing into ``out`` (a test folder,
    never the default ``reports/`` of the working directory)."""
    return ["check", str(DATA), "--out", str(out), "--coords", "east,north", "--value", "value",
            "--kernel", "matern32", "--params",
            *(f"{k}={v}" for k, v in PARAMS.items()),
            "--tolerances", repr(TOL), "--seed", str(SEED), "--holdout", str(HOLDOUT),
            "--probes", str(PROBES), "--solver-seeds", "1", "--reference", "dense",
            "--no-refit", "--json"]


def _task_record(out: Path) -> dict:
    records = [json.loads(p.read_text()) for p in out.rglob("*.json") if p.name != "run.json"]
    (record,) = [r for r in records if isinstance(r, dict) and r.get("result")]
    return record


def _judged(entry: dict) -> dict:
    """The engine's judged metrics (value, limit, uncertainty), status and seeds."""
    return {"status": entry["status"], "reasons": entry["reasons"],
            "metrics": {name: {k: entry[name][k] for k in ("value", "threshold",
                                                           "uncertainty", "passed")}
                        for name in JUDGED},
            "seeds": [{k: s[k] for k in ("seed", "loglik", "metrics", "uncertainty",
                                         "status")} for s in entry["seeds"]]}


def _check_single_threaded(monkeypatch, out: Path) -> int:
    """``check`` with one BLAS and numba thread, here and in its dense child, as a ``run``
    worker audits (``limited_threads(1)``): a threaded BLAS sums in another order, which
    moves the last digits."""
    from harness.grid.runner.jobs import limited_threads

    for name in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
        monkeypatch.setenv(name, "1")
    with limited_threads(1):
        return main(_check_args(out))


def test_run_and_check_give_identical_metrics_and_verdicts(tmp_path, capsys, monkeypatch):
    out = tmp_path / "run"
    assert main(["run", str(_case(tmp_path)), "--out", str(out)]) in (0, 1)
    record = _task_record(out)
    run_entry = record["result"]["audit"]
    capsys.readouterr()

    code = _check_single_threaded(monkeypatch, tmp_path / "check")
    check = json.loads(capsys.readouterr().out)
    (check_entry,) = check["tolerances"]
    assert code in (0, 1)

    assert check["reference"] == run_entry["reference"] == "dense"
    assert _judged(run_entry) == _judged(check_entry)
    # which reference served which metric, with the same kriging counts in both verbs
    # (kinds and counts; the certificates' last digits may differ)
    for verb in (run_entry, check):
        by_metric = verb["reference_by_metric"]
        assert {k: e["kind"] for k, e in by_metric.items()} == {
            "loglik": "dense", "score": "dense", "kriging": "dense"}
        assert by_metric["kriging"]["n_holdout"] == check["n_holdout"]
        assert by_metric["kriging"]["n_variance_points"] == check["n_variance_points"]
    assert run_entry["status"] in ("safe", "unsafe", "unresolved")
    # the flat results.csv columns carry the same deciding values
    metrics = record["result"]["metrics"]
    assert metrics["audit_loglik_err_nat"] == check_entry["loglik_error"]["value"]
    assert metrics["audit_param_shift_se"] == check_entry["param_shift_se"]["value"]


def test_both_verbs_call_the_engine_entry(tmp_path, monkeypatch, capsys):
    from harness.grid.cases import load_case
    from harness.grid.runner.jobs import execute

    calls: list[tuple[float, ...]] = []
    original = engine.audit_tolerances

    def spy(data, solver, tolerances, reference, **kwargs):
        calls.append(tuple(tolerances))
        return original(data, solver, tolerances, reference, **kwargs)

    monkeypatch.setattr(engine, "audit_tolerances", spy)
    assert main(_check_args(tmp_path / "check")) in (0, 1)
    capsys.readouterr()
    assert calls == [(TOL,)]

    (task,) = load_case(_case(tmp_path)).tasks()
    outcome = execute({"key": task.key, "stage": "accuracy", "task": task.to_dict()})
    assert outcome["status"] == "ok", outcome.get("error")
    assert calls == [(TOL,), (TOL,)]


@pytest.mark.parametrize("kind", ["statespace", "kronecker"])
def test_structured_references_judge_without_fisher(kind):
    """A structured reference gives exact values; the state-space one also krige the
    held-out points (RTS smoother), the Kronecker one does not. Without a Fisher
    information the shift is not measured, so the verdict is unresolved, never safe."""
    import numpy as np

    from harness.audit.audit_references import build_reference
    from harness.audit.audit_sampling import audit_draws
    from harness.model.kernels import make_kernel
    from harness.solvers.registry import resolve_solver

    if kind == "statespace":
        points = np.sort(np.random.default_rng(1).random(200))[:, None]
        kernel = make_kernel("matern32", PARAMS)
    else:
        from harness.geometry.pointsets import tensor_grid
        from harness.references.kronecker import SeparableKernel

        points = tensor_grid((14, 14))
        kernel = SeparableKernel(make_kernel("matern32", PARAMS))  # type: ignore[assignment]
    y = np.random.default_rng(2).standard_normal(points.shape[0])
    hold, probes = audit_draws(points.shape[0], holdout=10, probes=4, seed=0)
    data = engine.AuditData(points=points, y=y, kernel=kernel, mean="constant",
                            holdout=hold, fisher=None, probes=probes)
    # the built-in HODLR solver takes no separable product kernel; the dense solver does
    solver = resolve_solver("hodlr" if kind == "statespace" else "dense")
    reference = build_reference(kind, data, solver=solver, solver_options={}, base_seed=0,
                                memory_budget=None, ladder_factor=100.0, probes=4)
    result = engine.audit_tolerances(data, solver, (1e-8,), reference, seeds=(1,))
    (audit,) = result.tolerances
    assert audit.verdict.status == "unresolved"
    names = {m.name for m in audit.worst_metrics()}
    assert "loglik_error" in names
    assert ("kriging_mean_sd" in names) == (kind == "statespace")
    assert abs(next(m.value for m in audit.worst_metrics() if m.name == "loglik_error")) < 1e-3
