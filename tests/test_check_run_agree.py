"""``check`` and ``run`` give the same verdict and recommendation on the same data, solver,
tolerances and reference: both go through the audit engine's rule
(``harness.audit.engine``). Demo data (the documented soil-moisture generator) at a
reduced size, the true parameters, the built-in solver, the dense reference."""

from __future__ import annotations

from harness.analysis import load_run
from harness.audit.verdict import judge
from harness.check import CheckOptions, run_check, validate
from harness.check.datafile import observations_from_arrays
from harness.check.demo_data import TRUE_KERNEL, TRUE_PARAMS, generate_demo
from harness.cli import main

N = 1200
TOLERANCES = (1e-2, 1e-8)


def test_check_and_run_agree_on_demo_data(tmp_path):
    demo = generate_demo(n=N)
    frame = demo.frame
    path = tmp_path / "soil_moisture.csv"
    frame.to_csv(path, index=False)
    ls = TRUE_PARAMS["lengthscale"]
    case = tmp_path / "agree.toml"
    case.write_text(f"""
name = "agree"
seeds = [0]

[[pointsets]]
file = "{path.as_posix()}"
columns = ["easting_m", "northing_m"]
values = "vwc"
sizes = [{N}]

[[kernels]]
family = "{TRUE_KERNEL}"
variance = {TRUE_PARAMS["variance"]}
lengthscale = [{ls[0]}, {ls[1]}]
nugget = {TRUE_PARAMS["nugget"]}

[mean]
models = ["constant"]

[[solvers]]
name = "hodlr"
tolerances = [{", ".join(repr(t) for t in TOLERANCES)}]
options = {{ leaf_size = 128 }}

[trace]
method = "exact"

[metrics]
holdout = 48

[timing]
enabled = false

[reference]
order = ["dense"]
""")
    out = tmp_path / "run"
    assert main(["run", str(case), "--out", str(out)]) == 0
    verdicts = judge(load_run(out).results)
    run_status = {v.tol: v.status for v in verdicts.verdicts}
    (run_rec,) = verdicts.recommendations

    obs = observations_from_arrays(frame[["easting_m", "northing_m"]].to_numpy(),
                                   frame["vwc"].to_numpy(), source=str(path))
    options = CheckOptions(kernel=TRUE_KERNEL, mean="constant", tolerances=TOLERANCES,
                           fixed_params=dict(TRUE_PARAMS), reference="dense", seed=0,
                           solver_seeds=1, refit=False)
    result = run_check(validate(obs), options, source=str(path))
    check_status = {row.tol: row.status for row in result.tolerances}

    assert run_status == check_status == {1e-2: "unsafe", 1e-8: "safe"}
    assert result.recommended_tolerance == run_rec.tol == 1e-8
    assert result.reference == "dense"
