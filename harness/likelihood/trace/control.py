"""A control variate for the score's trace terms: an operator whose traces are known.

The score's trace term tr(S~_i), S~_i = Sigma~^-1 Sigma~_i, of a factorization Sigma~ is
estimated on its own by Hutchinson's estimator with a variance of order ||S~_i||_F^2 / k
(Hutchinson 1990, Commun. Statist. Simul. 19; Avron and Toledo 2011, J. ACM 58: for
Rademacher probes, 2 (||A||_F^2 - sum_j A_jj^2) / k). In units of the parameters' SEs
that noise does not shrink with n, and against an exact value reference (the Kalman
filter) it alone left the parameter shift unresolved on 100,000 points on a line.

With an operator B_i whose trace is known, and whose per-probe values z_j' B_i z_j are
known on the probe columns Z, the same probes estimate only the difference (a control
variate; Glasserman 2004, *Monte Carlo Methods in Financial Engineering*, sec. 4.1):

    tr(S~_i) = tr(B_i) + E_z[ z' (S~_i - B_i) z ],

    estimate_i = tr(B_i) + (1/k) sum_j d_ij,   d_ij = z_j' S~_i z_j - z_j' B_i z_j,
    SE_i       = sd_j(d_ij) / sqrt(k) + b_i / 2,

unbiased for any B_i, with a variance of order ||S~_i - B_i||_F^2 / k. ``b_i`` bounds
the error of the mean of the known per-probe values (for example a CG residual bound);
it enters as b / 2, so that the audit rule's 2 x uncertainty covers it, as every
deterministic bound does there.

The audit's B_i is the exact Sigma^-1 Sigma_i itself, on the audit's shared probes
(``harness.audit.shared_probes``): the estimate is then that of common random numbers,
as in the dense audit (``harness.audit.sides``), and its noise is that of the solver's
compression error alone. In a development run on 20,000 points on a line (not a
contract figure) it took HODLR's shift SE from 1.1 to 2e-5 SE.

A tight Vecchia approximation was tried as B_i and rejected: on 2,000 points on a line
(Matern 3/2, l = 0.5, nugget 1e-2) the off-diagonal Frobenius norm of S_i - B_i was
7-17x that of S_i itself at 40 neighbours, so it raised the variance.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from harness.likelihood.trace.affine import declared_reduction

#: Probe columns per block of right-hand sides in ``probe_quadratics`` (memory: a few
#: n x block arrays at a time).
PROBE_BLOCK = 16


@dataclass(frozen=True)
class TraceControl:
    """The control B_i on shared probes (module docstring).

    ``probes`` holds the probe columns Z (n, k), ``exact`` tr(B_i), ``per_probe``
    z_j' B_i z_j with shape (p, k), ``bound`` a bound (p,) on the error of the mean of
    each row of ``per_probe``; ``source`` says what B_i is. ``estimated_on_probes``: the
    traces in ``exact`` are themselves estimated from these probes (the exact operator's)
    rather than known (the Kalman filter's), so an estimate made with the control is
    correlated with them.
    """

    probes: np.ndarray
    exact: np.ndarray
    per_probe: np.ndarray
    bound: np.ndarray
    source: str
    estimated_on_probes: bool = False


@dataclass(frozen=True)
class ControlledTraces:
    """tr(S~_i) estimated with a ``TraceControl`` (module docstring), with its SE."""

    traces: np.ndarray
    stderr: np.ndarray
    probes: int
    note: str


def probe_quadratics(factorization: object, count: int, probes: np.ndarray, *,
                     block: int = PROBE_BLOCK) -> np.ndarray:
    """z_j' Sigma^-1 Sigma_i z_j for each parameter i < ``count`` and probe column j.

    ``factorization`` offers ``solve`` and ``derivative_matvec(i, B)`` (a solver adapted
    by ``harness.solvers.fallback`` always does). Where it declares Sigma_i = a_i Sigma +
    b_i I (``derivative_affine``, checked by ``affine.declared_reduction``), the value is
    a_i z'z + b_i z' Sigma^-1 z from one shared solve, the same reduction the solver's own
    likelihood path takes (``harness.likelihood.trace.affine``); a declaration that fails
    its check is ignored and every parameter takes its own product. Columns are taken
    ``block`` at a time, so memory stays O(n x block). Returns shape (count, k).
    """
    z = np.asarray(probes, dtype=float)
    out = np.empty((count, z.shape[1]))
    solve = getattr(factorization, "solve")  # noqa: B009
    derivative = getattr(factorization, "derivative_matvec")  # noqa: B009
    try:
        reduction = declared_reduction(factorization, count)  # type: ignore[arg-type]
    except ValueError:
        reduction = None
    forms = reduction.forms if reduction is not None else (None,) * count
    for c0 in range(0, z.shape[1], block):
        cols = z[:, c0:c0 + block]
        base = None          # z' Sigma^-1 z of this block, once
        for i in range(count):
            form = forms[i]
            if form is None:
                products = np.asarray(solve(np.asarray(derivative(i, cols), dtype=float)))
                out[i, c0:c0 + block] = np.einsum("nk,nk->k", cols, products)
                continue
            if base is None:
                base = np.einsum("nk,nk->k", cols, np.asarray(solve(cols), dtype=float))
            out[i, c0:c0 + block] = (form.sigma * np.einsum("nk,nk->k", cols, cols)
                                     + form.identity * base)
    return out


def combine_estimates(first: np.ndarray, first_se: np.ndarray, second: np.ndarray,
                      second_se: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Inverse-variance weighted mean of two independent unbiased estimates, per entry.

    mean = (a / sa^2 + b / sb^2) / (1 / sa^2 + 1 / sb^2), SE = (1 / sa^2 + 1 / sb^2)^-1/2
    (Graybill and Deal 1959, Biometrics 15, "from memory": with weights estimated from
    independent samples the mean stays unbiased and its variance is at most that of the
    better estimate, up to the weights' own noise). An entry with a zero SE is taken
    whole.
    """
    a, sa = np.asarray(first, dtype=float), np.asarray(first_se, dtype=float)
    b, sb = np.asarray(second, dtype=float), np.asarray(second_se, dtype=float)
    va, vb = sa ** 2, sb ** 2
    total = va + vb
    weight = np.divide(vb, total, out=np.full_like(total, 0.5), where=total > 0)
    mean = weight * a + (1.0 - weight) * b
    se = np.sqrt(np.divide(va * vb, total, out=np.zeros_like(total), where=total > 0))
    return mean, se


def controlled_traces(factorization: object, count: int, control: TraceControl
                      ) -> ControlledTraces:
    """tr(Sigma~^-1 Sigma~_i) by the control variate on its probes (module docstring)."""
    z = np.asarray(control.probes, dtype=float)
    if z.ndim != 2 or z.shape[1] < 2 or control.per_probe.shape[1:] != (z.shape[1],):
        raise ValueError(f"a trace control needs at least 2 probe columns with one value "
                         f"each; got probes {z.shape}, values {control.per_probe.shape}")
    if control.per_probe.shape[0] != count or control.exact.shape != (count,):
        raise ValueError(f"the trace control covers {control.per_probe.shape[0]} "
                         f"parameters; the factorization's kernel has {count}")
    difference = probe_quadratics(factorization, count, z) - control.per_probe
    k = z.shape[1]
    traces = control.exact + difference.mean(axis=1)
    stderr = difference.std(axis=1, ddof=1) / np.sqrt(k) + 0.5 * control.bound
    note = (f"traces by a control variate: the traces of {control.source} plus the "
            f"Hutchinson mean of the difference on {k} shared Rademacher probes")
    return ControlledTraces(traces=traces, stderr=stderr, probes=k, note=note)
