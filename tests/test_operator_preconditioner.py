"""The exact operator's preconditioner (``harness.audit.operator_preconditioner``): HODLR at
tol 1e-10 by default, Vecchia with a pilot-chosen neighbour count as the option, both
wired into the operator reference of ``check``/``run`` and ``evaluate``.

Sources: the dense log-likelihood and kriging mean from scipy's Cholesky factor
(Rasmussen and Williams 2006, eq. 2.30 and eq. 2.25); the pilot's cost model from its own
docstring (``predicted_seconds``).
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
import scipy.linalg as sl

from harness.audit.audit_references import build_reference, reference_by_metric
from harness.audit.engine import AuditData
from harness.audit.operator_preconditioner import (
    HODLR_TOL,
    PreconditionerSpec,
    build_operator_preconditioner,
    pilot_neighbours,
    predicted_probes,
    predicted_products,
    predicted_seconds,
)
from harness.cli import main
from harness.infra.option_specs import OptionError
from harness.model.kernels import Matern, Matern32
from harness.references.operator import operator_evaluate, operator_kriging
from harness.solvers.registry import resolve_solver

N = 500
KERNEL = Matern32(1.0, 0.1, 0.01)
CANDIDATES = (5, 10, 20)


@pytest.fixture(scope="module")
def problem():
    rng = np.random.default_rng(11)
    points = rng.random((N, 2))
    cov = KERNEL.covariance(points)
    y = np.linalg.cholesky(cov) @ rng.standard_normal(N)
    return points, y, cov


@pytest.fixture(scope="module")
def vecchia(problem):
    points, _, _ = problem
    return build_operator_preconditioner(points, KERNEL, PreconditionerSpec(family="vecchia"),
                                         rng=np.random.default_rng(3))


def _dense_loglik(cov: np.ndarray, y: np.ndarray) -> float:
    """-1/2 y' K^-1 y - sum log diag(L) - n/2 log 2 pi (R&W 2006, eq. 2.30), scipy Cholesky."""
    chol = sl.cho_factor(cov, lower=True)
    alpha = sl.cho_solve(chol, y)
    return float(-0.5 * y @ alpha - np.sum(np.log(np.diag(chol[0])))
                 - 0.5 * y.size * np.log(2.0 * np.pi))


class ScriptedClock:
    """Returns instants whose successive pairs span the given intervals
    (``pilot_neighbours`` documents its call order)."""

    def __init__(self, intervals: list[float]) -> None:
        self.times = list(np.cumsum([0.0, *[v for d in intervals for v in (d, 0.0)]]))

    def __call__(self) -> float:
        return float(self.times.pop(0))


def _script(product: float, factors: list[float], traces: list[float]) -> list[float]:
    """Interval lengths in call order: the product, then per candidate the factorization,
    PCG, Lanczos and the traces."""
    out = [product]
    for f, t in zip(factors, traces, strict=True):
        out.extend([f, 1.0, 1.0, t])
    return out


def test_hodlr_is_the_default():
    # HODLR was 4.5x faster at 16,384 points (benchmarks/results/operator_preconditioner.json)
    assert PreconditionerSpec().family == "hodlr"
    assert PreconditionerSpec().knob_name == "tol"


def test_the_pilot_chooses_vecchia_neighbours(vecchia):
    assert vecchia.family == "vecchia" and vecchia.knob_name == "neighbours"
    assert vecchia.pilot is not None and vecchia.pilot.candidates
    assert vecchia.knob_value == vecchia.pilot.chosen
    cheapest = min(vecchia.pilot.candidates, key=lambda c: c.predicted_seconds)
    assert vecchia.pilot.chosen == cheapest.neighbours
    assert all(c.converged and c.iterations >= 1 and c.lanczos_steps >= 1
               for c in vecchia.pilot.candidates)


def test_loglik_with_vecchia_preconditioner_matches_dense_cholesky(problem, vecchia):
    # Source: R&W 2006, eq. 2.30 through scipy.linalg.cho_factor.
    points, y, cov = problem
    ev = operator_evaluate(points, y, KERNEL, preconditioner=vecchia.factorization, rng=4,
                           score=False, progress=False)
    assert ev.converged and np.isfinite(ev.loglik_se)
    dense = _dense_loglik(cov, y)
    assert abs(ev.loglik - dense) <= 3 * ev.loglik_se + 0.5 * ev.quadratic_bound + 1e-9 * abs(
        dense)


def test_kriging_mean_with_vecchia_preconditioner_matches_the_dense_formula(problem):
    # Source: R&W 2006, eq. 2.25: mean = k*' (K + s2_n I)^-1 y, via scipy's Cholesky.
    points, y, cov = problem
    train, new = points[:400], points[400:]
    built = build_operator_preconditioner(train, KERNEL,
                                          PreconditionerSpec(family="vecchia", knob=10),
                                          rng=np.random.default_rng(5))
    assert built.pilot is None and built.knob_value == 10
    kr = operator_kriging(train, y[:400], KERNEL, new, preconditioner=built.factorization,
                          progress=False)
    assert kr.converged
    cross = cov[400:, :400]
    expected = cross @ sl.cho_solve(sl.cho_factor(cov[:400, :400], lower=True), y[:400])
    assert kr.mean.size == expected.size > 0
    assert np.all(np.abs(kr.mean - expected) <= kr.mean_bound + 1e-9 * np.abs(expected).max())


def test_hodlr_stays_selectable_and_gives_the_same_answer(problem, vecchia):
    # Source: the dense value (R&W 2006, eq. 2.30); both within their stated uncertainty.
    points, y, cov = problem
    hodlr = build_operator_preconditioner(points, KERNEL, PreconditionerSpec(family="hodlr"),
                                          rng=np.random.default_rng(6))
    assert hodlr.family == "hodlr" and hodlr.knob_value == HODLR_TOL and hodlr.pilot is None
    dense = _dense_loglik(cov, y)
    h, v = (operator_evaluate(points, y, KERNEL, preconditioner=built.factorization, rng=7,
                              score=False, progress=False) for built in (hodlr, vecchia))
    assert h.converged and v.converged
    assert abs(h.loglik - dense) <= 3 * h.loglik_se + 0.5 * h.quadratic_bound + 1e-9 * abs(dense)
    assert abs(h.loglik - v.loglik) <= 3 * (h.loglik_se + v.loglik_se) + 0.5 * (
        h.quadratic_bound + v.quadratic_bound) + 1e-9 * abs(dense)


def test_pilot_picks_the_smallest_predicted_cost_from_an_injected_clock(problem):
    # Source: the cost model of ``predicted_seconds`` (its docstring).
    points, _, _ = problem
    x = points[:300]
    zeros = [0.0, 0.0, 0.0]
    # Free setup and a costly product: the fewest predicted products win.
    cheap_setup = pilot_neighbours(x, KERNEL, rng=np.random.default_rng(8),
                                   candidates=CANDIDATES, pilot_points=200,
                                   clock=ScriptedClock(_script(1.0, zeros, zeros)))
    # A costly setup beyond the first candidate and a free product: m = 5 wins.
    costly = ([1.0, 50.0, 60.0], [0.5, 1.0, 2.0])
    cheap_product = pilot_neighbours(x, KERNEL, rng=np.random.default_rng(8),
                                     candidates=CANDIDATES, pilot_points=200,
                                     clock=ScriptedClock(_script(0.0, *costly)))
    assert cheap_product.chosen == 5
    fewest = min(cheap_setup.candidates, key=lambda c: (c.predicted_products, c.neighbours))
    assert cheap_setup.chosen == fewest.neighbours
    for pilot, (factors, traces) in ((cheap_setup, (zeros, zeros)), (cheap_product, costly)):
        assert pilot.pilot_n == 200 and len(pilot.candidates) == len(CANDIDATES)
        for c, f, t in zip(pilot.candidates, factors, traces, strict=True):
            assert (c.factor_seconds, c.trace_seconds, c.pcg_seconds) == (f, t, 1.0)
            assert c.predicted_products == predicted_products(
                iterations=c.iterations, lanczos_steps=c.lanczos_steps,
                probes=c.predicted_probes) > 0
            assert c.predicted_seconds == pytest.approx(predicted_seconds(
                n=300, pilot_n=200, setup_seconds=f + t, products=c.predicted_products,
                product_seconds=pilot.product_seconds), rel=1e-12)
        best = min(pilot.candidates, key=lambda c: (c.predicted_seconds, c.neighbours))
        assert pilot.chosen == best.neighbours


def test_cost_model_formulas():
    # Source: the docstrings of predicted_seconds (t_s n/s + K t_p (n/s)^2),
    # predicted_products (k + N/16 (l + k)) and predicted_probes (v n/s / (4 * 0.02^2),
    # clipped to [16, 256] in whole batches of 16).
    got = predicted_seconds(n=4000, pilot_n=1000, setup_seconds=2.0, products=30,
                            product_seconds=0.5)
    assert got == pytest.approx(2.0 * 4 + 30 * 0.5 * 16, rel=1e-15)
    assert predicted_products(iterations=6, lanczos_steps=3, probes=64) == 6 + 4 * 9
    assert predicted_probes(logdet_variance=0.0, n=10, pilot_n=5) == 16
    assert predicted_probes(logdet_variance=0.016, n=4000, pilot_n=1000) == 48  # 40 -> 48
    assert predicted_probes(logdet_variance=1.0, n=4000, pilot_n=1000) == 256
    assert predicted_probes(logdet_variance=float("nan"), n=10, pilot_n=5) == 256


def test_vecchia_refused_falls_back_to_hodlr_and_says_why(problem):
    points, _, _ = problem
    general = Matern(1.0, 0.1, 0.01, nu=0.7)  # no compiled closed form: vecchia refuses it
    built = build_operator_preconditioner(points[:200], general,
                                          PreconditionerSpec(family="vecchia"),
                                          rng=np.random.default_rng(9))
    assert built.family == "hodlr" and "compiled closed form" in built.fallback
    assert "vecchia could not be built" in built.describe()


def test_bad_specs_name_the_option():
    with pytest.raises(OptionError, match="--preconditioner"):
        PreconditionerSpec(family="cholmod")
    with pytest.raises(ValueError, match="--preconditioner-neighbours"):
        PreconditionerSpec(family="vecchia", knob=0)
    with pytest.raises(ValueError, match="--preconditioner-tol"):
        PreconditionerSpec(family="hodlr", knob=2.0)


def test_operator_reference_reports_preconditioner_pilot_and_iterations(problem):
    points, y, _ = problem
    data = AuditData(points=points, y=y, kernel=KERNEL, mean="zero",
                     holdout=np.arange(450, N), fisher=None,
                     probes=np.random.default_rng(10).choice([-1.0, 1.0], size=(N, 4)),
                     variance_at=np.arange(5))
    common = {"solver": resolve_solver("hodlr"), "solver_options": {}, "base_seed": 0,
              "memory_budget": None, "ladder_factor": 100.0, "probes": 64}
    default = build_reference("operator", data,
                              preconditioner=PreconditionerSpec(family="vecchia"), **common)
    entries = reference_by_metric(default, data)
    assert set(entries) == {"loglik", "score", "kriging"}
    record = entries["loglik"]["preconditioner"]
    assert record["family"] == "vecchia" and record["knob"] == "neighbours"
    assert record["pilot"]["chosen"] == record["knob_value"]
    assert len(record["pilot"]["candidates"]) >= 1
    assert record["iterations_loglik_score"] >= 1 and record["iterations_kriging"] >= 1
    assert default.info.to_dict()["preconditioner"] == record
    assert "vecchia at neighbours" in default.info.description
    hodlr = build_reference("operator", data, preconditioner=PreconditionerSpec(family="hodlr"),
                            **common)
    detail = hodlr.info.to_dict()["preconditioner"]
    assert detail["family"] == "hodlr" and detail["knob_value"] == HODLR_TOL
    assert detail["pilot"] is None


@pytest.fixture
def datafile(plane_csv) -> Path:
    return plane_csv[0]


EVALUATE = ["--coords", "x,y", "--value", "v", "--kernel", "matern32", "--param",
            "variance=1", "--param", "lengthscale=0.1", "--param", "nugget=0.01", "--json",
            "--solver", "operator", "--no-score"]


def test_evaluate_with_the_vecchia_preconditioner(datafile: Path, capsys):
    # Source: the dense reference through the same CLI (certified Cholesky).
    assert main(["evaluate", str(datafile), *EVALUATE[:-3]]) == 0
    dense = json.loads(capsys.readouterr().out)
    assert main(["evaluate", str(datafile), *EVALUATE, "--preconditioner", "vecchia",
                 "--preconditioner-neighbours", "60"]) == 0
    fixed = json.loads(capsys.readouterr().out)
    assert fixed["preconditioner"]["family"] == "vecchia"
    assert fixed["preconditioner"]["knob_value"] == 60 and fixed["preconditioner"]["pilot"] is None
    assert abs(fixed["loglik"] - dense["loglik"]) <= 3 * fixed["loglik_se"] + 1e-6
    assert main(["evaluate", str(datafile), *EVALUATE, "--preconditioner", "vecchia"]) == 0
    piloted = json.loads(capsys.readouterr().out)["preconditioner"]
    assert piloted["pilot"]["chosen"] == piloted["knob_value"]


def test_bad_preconditioner_options_exit_2_naming_the_option(datafile: Path, capsys):
    with pytest.raises(SystemExit) as stop:
        main(["check", str(datafile), "--coords", "x,y", "--value", "v", "--preconditioner",
              "cholmod"])
    assert stop.value.code == 2 and "--preconditioner" in capsys.readouterr().err
    code = main(["evaluate", str(datafile), *EVALUATE, "--preconditioner", "hodlr",
                 "--preconditioner-neighbours", "10"])
    assert code == 2 and "--preconditioner-neighbours" in capsys.readouterr().err
    with pytest.raises(SystemExit) as stop:
        main(["evaluate", str(datafile), *EVALUATE, "--preconditioner", "vecchia",
              "--preconditioner-neighbours", "0"])
    assert stop.value.code == 2 and "--preconditioner-neighbours" in capsys.readouterr().err


def test_operator_reference_holds_one_preconditioner_at_a_time(problem, monkeypatch):
    # Source: OperatorReference's contract (harness.audit.audit_references, and the cost
    # plan's memory model that relies on it): the preconditioner of all points is released
    # before the conditioning points' one is built, so the two are never alive at once.
    import gc
    import weakref

    import harness.audit.audit_references as audit_references

    points, y, _ = problem
    data = AuditData(points=points, y=y, kernel=KERNEL, mean="zero",
                     holdout=np.arange(450, N), fisher=None,
                     probes=np.random.default_rng(10).choice([-1.0, 1.0], size=(N, 4)),
                     variance_at=np.arange(5))
    built: list[weakref.ref] = []
    alive_at_build: list[int] = []
    original = audit_references.build_operator_preconditioner

    def tracked(*args, **kwargs):
        gc.collect()
        alive_at_build.append(sum(ref() is not None for ref in built))
        result = original(*args, **kwargs)
        built.append(weakref.ref(result.factorization))
        return result

    monkeypatch.setattr(audit_references, "build_operator_preconditioner", tracked)
    audit_references.OperatorReference(data, base_seed=0,
                                       preconditioner=PreconditionerSpec(family="hodlr"))
    assert alive_at_build == [0, 0] and len(built) == 2
