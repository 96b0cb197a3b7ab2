"""Verdicts, recommendations and the trace calibration check."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from harness.audit.verdict import ThresholdError, Thresholds, judge, trace_calibration
from harness.grid.store.columns import RESULT_COLUMNS


def _rows(specs: list[dict]) -> pd.DataFrame:
    base = {c: np.nan for c in RESULT_COLUMNS}
    base.update(case="c", kernel="matern32", shape="", n=1000.0, d=2.0, geometry="uniform",
                mean="constant", variance=1.0, lengthscale="0.1", nugget=1e-4,
                trace_method="hutchpp", reference="dense", status="ok",
                reference_certificate=0.5, error_type="", error_message="")
    return pd.DataFrame([{**base, **s} for s in specs])


def _hodlr(tol: float, err: float, t: float, **extra: object) -> dict:
    row = dict(solver="hodlr", tol=tol, loglik_abs_err=err, param_shift_se_max=err,
               kriging_mean_err_sd_max=err / 4, t_total=t)
    row.update(extra)
    return row


def test_safe_unsafe_and_boundary():
    # Limits 0.1 nat / 0.1 SE / 0.05 SD (DEVELOPERS.md, The verdict rule); a value equal to
    # a limit passes.
    vs = judge(_rows([_hodlr(1e-2, 0.5, 1.0), _hodlr(1e-4, 0.1, 2.0), _hodlr(1e-6, 1e-4, 3.0)]))
    status = {v.tol: v.status for v in vs.verdicts}
    assert status == {1e-2: "unsafe", 1e-4: "safe", 1e-6: "safe"}
    failing = [e.metric for e in vs.verdicts[2].evidence if e.passed is False]
    # sorted by tol, so 1e-2 comes last; 0.5 / 4 = 0.125 > 0.05 fails the kriging limit too
    assert failing == ["loglik_abs_err", "param_shift_se_max", "kriging_mean_err_sd_max"]


def test_recommendation_is_loosest_safe_with_speedup_over_dense():
    rows = _rows([_hodlr(1e-2, 0.5, 1.0), _hodlr(1e-4, 0.01, 2.0), _hodlr(1e-6, 1e-4, 3.0),
                  dict(solver="dense", tol=np.nan, t_total=10.0),
                  dict(solver="dense", tol=np.nan, t_total=14.0, seed=1.0)])
    (rec,) = judge(rows).recommendations
    assert rec.tol == 1e-4
    assert rec.speedup == pytest.approx(12.0 / 2.0)  # median(10, 14) / 2
    assert rec.speedup_over == "dense"


def test_speedup_over_tightest_tolerance_without_dense():
    (rec,) = judge(_rows([_hodlr(1e-4, 0.01, 2.0), _hodlr(1e-6, 1e-4, 3.0)])).recommendations
    assert rec.tol == 1e-4 and rec.speedup == pytest.approx(1.5)
    assert "tol=1e-06" in rec.speedup_over


def test_missing_metric_makes_verdict_unresolved():
    # The engine's rule (harness.audit.engine): a metric not measured is never safe.
    vs = judge(_rows([_hodlr(1e-4, 0.01, 2.0, kriging_mean_err_sd_max=np.nan)]))
    (v,) = vs.verdicts
    assert v.status == "unresolved"
    kriging = next(e for e in v.evidence if e.metric == "kriging_mean_err_sd_max")
    assert kriging.available is False and kriging.passed is None
    assert np.isnan(vs.recommendations[0].tol)


def test_uncertified_reference_is_unresolved_and_structured_reference_is_certified():
    # An uncertified reference cannot decide either way: unresolved (engine rule).
    bad = judge(_rows([_hodlr(1e-4, 0.01, 2.0, reference_certificate=45.0)]))
    assert bad.verdicts[0].status == "unresolved"
    exact = judge(_rows([_hodlr(1e-4, 0.01, 2.0, reference="statespace",
                                reference_certificate=np.nan)]))
    assert exact.verdicts[0].status == "safe"
    ladder = judge(_rows([_hodlr(1e-4, 0.01, 2.0, reference="ladder",
                                 reference_certificate=np.nan)]))
    assert ladder.verdicts[0].status == "unresolved"
    assert any("ladder" in r for r in ladder.verdicts[0].reasons)


def test_evidence_states_thresholds_are_common_practice():
    (v,) = judge(_rows([_hodlr(1e-4, 0.01, 2.0)])).verdicts
    assert all("common practice" in e.basis for e in v.evidence)


def test_thresholds_configurable_from_case_text():
    th = Thresholds.from_case_text('[verdict]\nloglik_nats = 0.01\n')
    assert th.loglik_nats == 0.01 and th.param_shift_se == 0.1
    vs = judge(_rows([_hodlr(1e-4, 0.05, 2.0)]), thresholds=th)
    assert vs.verdicts[0].status == "unsafe"
    assert th.with_overrides(loglik_nats=None, param_shift_se=0.2).param_shift_se == 0.2


@pytest.mark.parametrize("text, message", [
    ("[verdict]\nloglik = 0.1\n", "unknown setting"),
    ("[verdict]\nloglik_nats = -1\n", "positive number"),
    ("[verdict]\ntrace_alpha = 1.5\n", "below 1"),
])
def test_bad_thresholds_are_refused(text, message):
    with pytest.raises(ThresholdError, match=message):
        Thresholds.from_case_text(text)


def test_failed_tolerance_has_failed_verdict():
    vs = judge(_rows([_hodlr(1e-4, np.nan, np.nan, status="failed"), _hodlr(1e-6, 1e-4, 3.0)]))
    assert {v.tol: v.status for v in vs.verdicts} == {1e-4: "failed", 1e-6: "safe"}


def _trace_rows(z: np.ndarray) -> pd.DataFrame:
    return _rows([_hodlr(1e-6, 1e-4, 1.0, seed=float(i), probes=32.0, trace_z_max=abs(v))
                  for i, v in enumerate(z)])


def test_calibrated_estimator_is_not_flagged():
    z = np.random.default_rng(0).standard_normal(60)
    (cal,) = trace_calibration(_trace_rows(z))
    assert cal.inside == int(np.sum(np.abs(z) <= 2)) and not cal.flagged


def test_overconfident_estimator_is_flagged_with_binomial_p_value():
    # Reported SE three times too small: z ~ N(0, 9). p-value: binomial CDF (closed form).
    z = 3.0 * np.random.default_rng(1).standard_normal(60)
    (cal,) = trace_calibration(_trace_rows(z))
    assert cal.flagged and cal.fraction < 0.8
    assert cal.p_value == pytest.approx(stats.binom.cdf(cal.inside, cal.count, 0.8), rel=1e-9)


def test_run_verdicts_use_the_engine_rule_worst_seed_and_ladder_order():
    # Two data seeds of one tolerance: the worse decides (engine rule); an unresolved
    # tighter tolerance blocks the looser safe one; spread over seeds is reported.
    rows = _rows([_hodlr(1e-6, 0.2, 3.0, seed=0.0), _hodlr(1e-6, 0.01, 3.0, seed=1.0),
                  _hodlr(1e-4, 0.01, 2.0, seed=0.0), _hodlr(1e-4, 0.02, 2.0, seed=1.0)])
    vs = judge(rows)
    status = {v.tol: v.status for v in vs.verdicts}
    assert status == {1e-6: "unsafe", 1e-4: "safe"}
    (rec,) = vs.recommendations
    assert np.isnan(rec.tol) and "1e-06" in rec.reason
    tight = next(v for v in vs.verdicts if v.tol == 1e-6)
    assert tight.spread["loglik_abs_err"]["max"] == 0.2
    assert tight.spread["loglik_abs_err"]["min"] == 0.01
