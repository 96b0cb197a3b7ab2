"""Exponential-kernel closed forms against the published-formula table and dense numpy.

``reference/check_values.csv`` holds values of the AR(1) / Ornstein-Uhlenbeck closed
forms (Brockwell and Davis 1991, sections 5.2 and 8.7; the source is named per row),
written by ``reference/make_check_values.py`` with plain ``math``. Each row is checked
three ways: the package's closed forms, a dense numpy computation (n <= 2000), and the
Kalman-filter reference (log det and log-likelihood rows).
"""

import csv
from pathlib import Path

import numpy as np
import pytest
from threadpoolctl import threadpool_limits

from harness.model.kernels import Exponential
from harness.references.closed_forms import (
    ClosedFormError,
    exponential_chain,
    exponential_fisher,
    exponential_logdet,
    exponential_loglik,
    exponential_precision,
    exponential_quadratic,
    exponential_trace_terms,
)
from harness.references.statespace import StateSpaceReference

TABLE = Path(__file__).resolve().parents[1] / "reference" / "check_values.csv"


@pytest.fixture(scope="module", autouse=True)
def _one_blas_thread():
    """Dense checks on one BLAS thread: on a shared 2-core machine OpenBLAS threads
    contend and a 2,000 x 2,000 Cholesky ran 25x slower with two threads."""
    with threadpool_limits(limits=1):
        yield


def load_rows():
    with TABLE.open() as fh:
        return list(csv.DictReader(fh))


ROWS = load_rows()
CASES = sorted({(int(r["n"]), float(r["spacing"]), float(r["lengthscale"]),
                 float(r["variance"])) for r in ROWS})


def table(case):
    n, h, ls, s2 = case
    out = {}
    for r in ROWS:
        if (int(r["n"]), float(r["spacing"]), float(r["lengthscale"]),
                float(r["variance"])) == case:
            assert r["kernel"] == "exponential" and r["source"]
            out[r["quantity"]] = float(r["value"])
    return out


def test_table_is_complete():
    assert len(CASES) >= 4
    for case in CASES:
        assert set(table(case)) == {"logdet", "quadratic_ones", "loglik_ones", "trace_dlogl",
                                    "fisher_ss", "fisher_sl", "fisher_ll"}


@pytest.mark.parametrize("case", CASES)
def test_closed_forms_reproduce_the_table(case):
    n, h, ls, s2 = case
    want = table(case)
    chain = exponential_chain(np.arange(n) * h, variance=s2, lengthscale=ls)
    ones = np.ones(n)
    assert exponential_logdet(chain) == pytest.approx(want["logdet"], rel=1e-11)
    assert exponential_quadratic(chain, ones) == pytest.approx(want["quadratic_ones"], rel=1e-11)
    assert exponential_loglik(chain, ones) == pytest.approx(want["loglik_ones"], rel=1e-11)
    tr = exponential_trace_terms(chain)
    assert tr[0] == n
    assert tr[1] == pytest.approx(want["trace_dlogl"], rel=1e-11)
    fisher = exponential_fisher(chain)
    np.testing.assert_allclose(fisher, [[want["fisher_ss"], want["fisher_sl"]],
                                        [want["fisher_sl"], want["fisher_ll"]]], rtol=1e-11)


def dense_exponential(x, s2, ls):
    r = np.abs(x[:, None] - x[None, :]) / ls
    k = s2 * np.exp(-r)
    return k, [k, s2 * r * np.exp(-r)]


@pytest.mark.parametrize("case", [c for c in CASES if c[0] <= 2000])
def test_dense_numpy_reproduces_the_table(case):
    n, h, ls, s2 = case
    want = table(case)
    k, derivs = dense_exponential(np.arange(n) * h, s2, ls)
    kinv = np.linalg.inv(k)
    ones = np.ones(n)
    assert np.linalg.slogdet(k)[1] == pytest.approx(want["logdet"], rel=1e-9)
    assert ones @ kinv @ ones == pytest.approx(want["quadratic_ones"], rel=1e-9)
    kl = kinv @ derivs[1]
    assert np.trace(kl) == pytest.approx(want["trace_dlogl"], rel=1e-9)
    assert 0.5 * np.sum(kl * kl.T) == pytest.approx(want["fisher_ll"], rel=1e-9)
    assert 0.5 * np.trace(kl) == pytest.approx(want["fisher_sl"], rel=1e-9)


@pytest.mark.parametrize("case", CASES)
def test_kalman_reference_reproduces_the_table(case):
    n, h, ls, s2 = case
    want = table(case)
    ref = StateSpaceReference(np.arange(n) * h, Exponential(variance=s2, lengthscale=ls))
    ev = ref.evaluate(np.ones(n), score=False)
    assert ev.logdet == pytest.approx(want["logdet"], rel=1e-10)
    assert ev.quadratic == pytest.approx(want["quadratic_ones"], rel=1e-10)
    assert ev.loglik == pytest.approx(want["loglik_ones"], rel=1e-10)


def test_irregular_points_against_dense():
    # irregular spacing: dense numpy log det, quadratic form, inverse, traces and Fisher
    rng = np.random.default_rng(5)
    x = np.sort(rng.random(300)) * 4.0
    s2, ls = 1.3, 0.25
    k, derivs = dense_exponential(x, s2, ls)
    kinv = np.linalg.inv(k)
    y = rng.standard_normal(300)
    chain = exponential_chain(x[:, None], variance=s2, lengthscale=ls)
    assert exponential_logdet(chain) == pytest.approx(np.linalg.slogdet(k)[1], rel=1e-11)
    assert exponential_quadratic(chain, y) == pytest.approx(y @ kinv @ y, rel=1e-9)
    diag, off = exponential_precision(chain)
    np.testing.assert_allclose(diag, np.diag(kinv), rtol=1e-9)
    np.testing.assert_allclose(off, np.diag(kinv, 1), rtol=1e-9)
    prods = [kinv @ d for d in derivs]
    np.testing.assert_allclose(exponential_trace_terms(chain), [np.trace(p) for p in prods],
                               rtol=1e-10)
    fisher = [[0.5 * np.sum(a * b.T) for b in prods] for a in prods]
    np.testing.assert_allclose(exponential_fisher(chain), fisher, rtol=1e-9)


def test_non_increasing_points_are_refused():
    with pytest.raises(ClosedFormError, match="strictly increasing"):
        exponential_chain(np.array([0.0, 0.2, 0.2]), variance=1.0, lengthscale=1.0)
