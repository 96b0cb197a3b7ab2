"""Parameters whose derivative is affine in Sigma share one trace estimate.

For Sigma = s2 R + tau2 I with theta = (log s2, log l_1 .. log l_k, log tau2)
(``harness.model.kernels.classes``) two derivatives need no product of their own:

    dSigma/dlog s2   = Sigma - tau2 I     (a = 1, b = -tau2),
    dSigma/dlog tau2 = tau2 I             (a = 0, b =  tau2).

Whenever Sigma_i = a_i Sigma + b_i I,

    A_i = Sigma^-1 Sigma_i = a_i I + b_i Sigma^-1,      tr(A_i) = a_i n + b_i tr(Sigma^-1),

and in the symmetric form W^-1 Sigma_i W^-T = a_i I + b_i W^-1 W^-T (W^-1 Sigma W^-T = I
for Sigma = W W'; where the factor reproduces the Sigma~ of the solver's products only
to some E = W W' - Sigma~, t_i moves by a_i tr(W^-1 E W^-T), which
``benchmarks/likelihood_scaling.py`` estimates for the HODLR factor). So all such
parameters are estimated from one base operator, B = Sigma^-1 (resp. W^-1 W^-T): the
operator of a "derivative" equal to the identity, which costs solves but no derivative
product. The estimator then runs on the base
family (B, then the operators of the other parameters), and

    t_i = a_i n + b_i t_B,      SE_i = |b_i| SE_B,

exactly what the estimator gives on A_i itself when it is linear in the products
(Hutchinson: z' A_i z = a_i z'z + b_i z'Bz with z'z = n for Rademacher z); Hutch++
sketches B instead of A_i, another unbiased estimate of the same trace (the sketch
only has to be independent of the residual probes; Meyer et al. 2021, Algorithm 1).
The Fisher information is estimated from the full products a_i Z + b_i B Z, formed
from the base products, so it is the estimator's own on the full family.

Only a factorization that declares ``derivative_affine(i) -> (a_i, b_i)`` (or None) is
treated this way: the identity has to hold for its own Sigma~ and its own derivative
products, which only the solver can promise. The declaration is checked once on one
Rademacher vector z: ||Sigma_i z - a_i Sigma z - b_i z|| must stay within
``DECLARATION_RTOL`` of the larger side, else the trace terms are refused.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from harness.likelihood.trace.operators import DerivativeMatvec, FactorizationOperators
from harness.linalg.rademacher import rademacher_probes
from harness.solvers.protocol import DifferentiableFactorization, Factorization

#: Relative residual allowed for a declared Sigma_i = a Sigma + b I on one probe vector
#: (common practice: far above rounding, which is what an exact identity leaves, 1e-13
#: for the HODLR solver in tests/test_hodlr.py; far below any real mismatch).
DECLARATION_RTOL = 1e-8


@dataclass(frozen=True)
class AffineForm:
    """Sigma_i = sigma * Sigma + identity * I."""

    sigma: float
    identity: float


@dataclass(frozen=True)
class AffineReduction:
    """How the p parameters map onto the base operators of the estimator.

    Attributes
    ----------
    forms : tuple of AffineForm or None
        One per parameter; None where the derivative is not affine in Sigma.
    """

    forms: tuple[AffineForm | None, ...]

    def __post_init__(self) -> None:
        if not any(f is not None for f in self.forms):
            raise ValueError("an affine reduction needs at least one affine parameter")

    @property
    def count(self) -> int:
        """Number of parameters p."""
        return len(self.forms)

    @property
    def others(self) -> tuple[int, ...]:
        """Parameters that keep an operator of their own, in order (base slots 1..)."""
        return tuple(i for i, f in enumerate(self.forms) if f is None)

    @property
    def base_count(self) -> int:
        """Operators of the base family: B (slot 0) and one per other parameter."""
        return 1 + len(self.others)

    @property
    def slots(self) -> tuple[int, ...]:
        """Each parameter's base slot: 0 (B) for an affine one, 1.. for the others."""
        own = {i: j + 1 for j, i in enumerate(self.others)}
        return tuple(own.get(i, 0) for i in range(self.count))

    def base_family(self, factorization: Factorization,
                    derivative_matvec: DerivativeMatvec) -> FactorizationOperators:
        """The family the estimator runs on: B = Sigma^-1 (slot 0, a "derivative" equal
        to the identity, never multiplied) and the other parameters' operators."""
        others = self.others

        def product(j: int, b: np.ndarray) -> np.ndarray:
            return derivative_matvec(others[j - 1], b)

        return FactorizationOperators(factorization, product, self.base_count,
                                      identity_slots=(0,))

    def expand_traces(self, estimate: np.ndarray, stderr: np.ndarray, n: int
                      ) -> tuple[np.ndarray, np.ndarray]:
        """Traces and standard errors of the p parameters from the base family's."""
        est = np.empty(self.count)
        se = np.empty(self.count)
        for i, (form, slot) in enumerate(zip(self.forms, self.slots, strict=True)):
            if form is None:
                est[i], se[i] = estimate[slot], stderr[slot]
            else:
                est[i] = form.sigma * n + form.identity * estimate[0]
                se[i] = abs(form.identity) * stderr[0]
        return est, se

    def expand_products(self, z: np.ndarray, base: np.ndarray) -> np.ndarray:
        """Products A_i Z (p, n, k) from Z (n, k) and the base products (base_count, n, k)."""
        out = np.empty((self.count, *z.shape))
        for i, (form, slot) in enumerate(zip(self.forms, self.slots, strict=True)):
            if form is None:
                out[i] = base[slot]
            else:
                out[i] = form.identity * base[0]
                if form.sigma != 0.0:
                    out[i] += form.sigma * z
        return out


def declared_reduction(factorization: DifferentiableFactorization, count: int
                       ) -> AffineReduction | None:
    """The reduction a factorization declares through ``derivative_affine``, or None.

    Each declared form is checked on one Rademacher vector against the factorization's
    own ``matvec`` and ``derivative_matvec`` (module docstring).

    Raises
    ------
    ValueError
        When ``derivative_affine(i)`` returns something other than None or two finite
        numbers, or when the declared identity fails the check.
    """
    declare = getattr(factorization, "derivative_affine", None)
    if not callable(declare):
        return None
    forms: list[AffineForm | None] = []
    for i in range(int(count)):
        got = declare(i)
        if got is None:
            forms.append(None)
            continue
        values = _two_numbers(got)
        if values is None:
            raise ValueError(f"derivative_affine({i}) must return None or two finite "
                             f"numbers (a, b) with Sigma_i = a Sigma + b I, got {got!r}")
        forms.append(AffineForm(*values))
    if not any(f is not None for f in forms):
        return None
    _check_declarations(factorization, forms)
    return AffineReduction(tuple(forms))


def _check_declarations(factorization: DifferentiableFactorization,
                        forms: list[AffineForm | None]) -> None:
    z = rademacher_probes(int(factorization.n), 1, np.random.default_rng(0))
    sigma_z = np.asarray(factorization.matvec(z), dtype=np.float64)
    product = factorization.derivative_matvec
    for i, form in enumerate(forms):
        if form is None:
            continue
        got = np.asarray(product(i, z), dtype=np.float64)
        expect = form.sigma * sigma_z + form.identity * z
        scale = max(float(np.linalg.norm(got)), float(np.linalg.norm(expect)))
        residual = float(np.linalg.norm(got - expect))
        if not residual <= DECLARATION_RTOL * scale:
            raise ValueError(
                f"derivative_affine({i}) declares dSigma/dtheta_{i} = {form.sigma:g} Sigma "
                f"+ {form.identity:g} I, but on a probe vector derivative_matvec({i}) "
                f"differs from that by {residual:.3g} (relative "
                f"{residual / scale if scale else float('inf'):.3g}, allowed "
                f"{DECLARATION_RTOL:g}); the declaration is wrong for this solver")


def _two_numbers(got: object) -> tuple[float, float] | None:
    try:
        values = np.asarray(got, dtype=np.float64)
    except (TypeError, ValueError):
        return None
    if values.shape != (2,) or not np.all(np.isfinite(values)):
        return None
    return float(values[0]), float(values[1])
