"""The Vecchia solver: Sigma~ = (U U')^-1 with U the KL-minimizing sparse inverse
Cholesky factor, as a ``harness.solvers.protocol`` Factorization.

Convention. Positions are those of the maximin order (``maximin``), coarse to fine;
P is that permutation, (P x)_k = x[perm[k]]. U is upper triangular in this order:
column k has rows c(k) (earlier positions, ``sparsity`` and ``supernodes``) and k, and

    Sigma~_perm^-1 = U U',   Sigma~ = P' (U U')^-1 P  (in the caller's order),

so that L~ = -1/2 ||U'P y||^2 + sum_k log U_kk - n/2 log 2 pi is Vecchia's (1988)
product of conditionals (``local_factor``). (Schafer, Katzfuss and Owhadi 2021 write
the same factor as lower triangular in the reverse, fine-to-coarse order.) Every
public method takes and returns vectors in the caller's point order.

Square root: W = P' U^-T P, Sigma~ = W W'; ``apply_sqrt`` is W b (one sparse
triangular solve), ``solve_sqrt`` is W^-1 b = P' U' P b (one sparse product).

Among Kullback-Leibler divergences KL(N(0, Sigma) || N(0, (U U')^-1)) over all U with
this sparsity, this U is the minimizer (Schafer et al. 2021, Thm. 2.1).
"""

from __future__ import annotations

import math
import time
from dataclasses import dataclass

import numpy as np

from harness.model.kernels import Kernel
from harness.solvers.knobs import KnobSpec
from harness.solvers.vecchia.local_factor import supernode_pass
from harness.solvers.vecchia.structure import (
    StructureCache,
    StructureTimings,
    VecchiaStructure,
    build_structure,
    pattern_rule,
    points_key,
)
from harness.solvers.vecchia.triangular import (
    row_form,
    u_mul,
    u_solve,
    u_solve_rows,
    ut_mul,
    ut_solve,
)
from harness.solvers.vecchia.vecchia_inputs import (
    check_duplicates,
    check_status,
    kernel_code,
)

#: The Vecchia solver's accuracy knob: m, the number of nearest earlier points each
#: point conditions on (``sparsity``; why a count and not the radius rule is measured
#: there). Its default sweep, m = 10, 30, 60, 130, gives about 21, 73, 159 and 366
#: nonzeros per column of U for 2D uniform points with the default supernodes (lam =
#: 1.5; n = 16,384), within the 10-400 per column that keeps a sweep at 10^6 points in
#: memory. Its steps are wide because the KL divergence falls more slowly per neighbour
#: as the points grow denser against the length scale: on one 16,384-point set (2D,
#: Matern 3/2, l = 0.1, nugget 1e-2) it fell only 3.8x from m = 10 to 20 (139 to 37
#: nats), against 9.1x at 4,096 points (``benchmarks/vecchia_pattern_rules.py``); the
#: sweep's falls at 16,384 are in ``benchmarks/results/vecchia_accuracy.json``.
NEIGHBOURS_KNOB = KnobSpec(
    name="neighbours", kind="int", low=1.0, high=math.inf, low_closed=True,
    high_closed=False, more_accurate="larger", default_sweep=(10.0, 30.0, 60.0, 130.0),
    meaning="number of nearest earlier points each point conditions on")
#: m when none is given: 20, between the sweep's first two values (common practice puts
#: m at 10-30).
DEFAULT_NEIGHBOURS = 20
#: The radius rule's range (an option, not the knob): rho in units of the maximin length.
RHO_RANGE = KnobSpec(
    name="rho", kind="float", low=1.0, high=math.inf, low_closed=True, high_closed=True,
    more_accurate="larger", default_sweep=(2.5, 4.0, 6.0, 9.0),
    meaning="conditioning radius in units of the maximin length scale")
DEFAULT_LAM = 1.5


@dataclass(frozen=True)
class VecchiaTimings:
    """Wall-clock seconds of one ``factorize`` call.

    ``structure`` is the time of building the ordering, pattern and supernodes in this
    call (zeros when ``reused``: a structure passed in or found in a cache); ``factor``
    the local factorizations.
    """

    structure: StructureTimings
    reused: bool
    factor: float

    @property
    def total(self) -> float:
        return self.structure.total + self.factor

    def to_dict(self) -> dict[str, object]:
        return {"structure": self.structure.to_dict(), "reused": self.reused,
                "factor": self.factor, "total": self.total}


_NO_TIME = StructureTimings(0.0, 0.0, 0.0)


class VecchiaFactorization:
    """Sigma~ = P' (U U')^-1 P (module docstring); built by ``factorize``.

    Vectors are (n,) or (n, k) in the caller's order. Attributes ``structure``,
    ``kernel``, ``timings``.
    """

    def __init__(self, *, kernel: Kernel, structure: VecchiaStructure, points: np.ndarray,
                 scaled: np.ndarray, values: np.ndarray, timings: VecchiaTimings) -> None:
        self.kernel = kernel
        self._points = points
        self.structure = structure
        self.timings = timings
        self._scaled = scaled
        self._vals = values
        self._derivs: np.ndarray | None = None
        g = structure.groups
        self._ptr, self._rows = g.col_ptr, g.col_rows
        self._perm = structure.order.perm
        self._diag = values[g.col_ptr[1:] - 1]
        self._rows_form: tuple[np.ndarray, np.ndarray, np.ndarray] | None = None

    # -- protocol ------------------------------------------------------------------
    @property
    def n(self) -> int:
        return self.structure.n

    @property
    def nbytes(self) -> int:
        """Bytes held: U's values, the structure (pattern, ordering) and any dU."""
        extra = 0 if self._derivs is None else self._derivs.nbytes
        if self._rows_form is not None:
            extra += sum(a.nbytes for a in self._rows_form)
        return int(self._vals.nbytes + self.structure.nbytes + self._scaled.nbytes + extra)

    @property
    def nnz(self) -> int:
        return self.structure.nnz

    def logdet(self) -> float:
        """log det Sigma~ = -2 sum_k log U_kk."""
        return -2.0 * float(np.sum(np.log(self._diag)))

    def solve(self, b: np.ndarray) -> np.ndarray:
        """Sigma~^-1 b = P' U U' P b."""
        return self._apply(b, lambda x: self._u_mul(ut_mul(self._ptr, self._rows,
                                                           self._vals, x)))

    def matvec(self, b: np.ndarray) -> np.ndarray:
        """Sigma~ b = P' U^-T U^-1 P b (two sparse triangular solves)."""
        return self._apply(b, lambda x: ut_solve(self._ptr, self._rows, self._vals,
                                                 self._u_solve(x)))

    def apply_sqrt(self, b: np.ndarray) -> np.ndarray:
        """W b = P' U^-T P b (b standard normal gives a sample from N(0, Sigma~))."""
        return self._apply(b, lambda x: ut_solve(self._ptr, self._rows, self._vals, x))

    def apply_sqrt_transpose(self, b: np.ndarray) -> np.ndarray:
        """W' b = P' U^-1 P b."""
        return self._apply(b, self._u_solve)

    def solve_sqrt(self, b: np.ndarray) -> np.ndarray:
        """W^-1 b = P' U' P b (one sparse product)."""
        return self._apply(b, lambda x: ut_mul(self._ptr, self._rows, self._vals, x))

    def solve_sqrt_transpose(self, b: np.ndarray) -> np.ndarray:
        """W^-T b = P' U P b."""
        return self._apply(b, self._u_mul)

    def derivative_matvec(self, i: int, b: np.ndarray) -> np.ndarray:
        """dSigma~/dtheta_i b, the derivative of this approximation (not of Sigma).

        From Sigma~ = (U U')^-1: dSigma~ = -Sigma~ (dU U' + U dU') Sigma~, so with
        w = U^-1 b and v = U^-T w (= Sigma~ b),

            dSigma~ b = -U^-T (U^-1 dU w + dU' v),

        two solves, one more solve and two sparse products: O(nnz). dU (all
        parameters) is computed on first use (``local_factor``) and kept.
        """
        p = self.kernel.n_params
        if not 0 <= i < p:
            raise IndexError(f"parameter index {i} out of range for {self.kernel.param_names}")
        du = self._derivatives()[i]
        ptr, rows, vals = self._ptr, self._rows, self._vals

        def op(x: np.ndarray) -> np.ndarray:
            w = u_solve(ptr, rows, vals, x)
            v = ut_solve(ptr, rows, vals, w)
            inner = u_solve(ptr, rows, vals, u_mul(ptr, rows, du, w)) + ut_mul(ptr, rows, du, v)
            return -ut_solve(ptr, rows, vals, inner)

        return self._apply(b, op)

    def derivative_traces(self) -> np.ndarray:
        """tr(Sigma~^-1 dSigma~/dtheta_i) for every parameter, exactly, shape (p,).

        By Jacobi's formula, d log det A = tr(A^-1 dA) (Magnus and Neudecker 2019,
        "Matrix Differential Calculus", 3rd ed., ch. 8; the chapter from memory), and
        log det Sigma~ = -2 sum_k log U_kk, so

            tr(Sigma~^-1 dSigma~_i) = -2 sum_k dU_kk,i / U_kk,

        O(n) once dU is at hand (``derivative_matvec`` needs it too). No probes: the
        exact operator uses it as a control variate with zero variance
        (``harness.references.operator.score_traces``).
        """
        du = self._derivatives()
        return -2.0 * (du[:, self._ptr[1:] - 1] / self._diag[None, :]).sum(axis=1)

    def derivative_affine(self, i: int) -> tuple[float, float] | None:
        """(1, 0) for the log variance when the nugget is zero: then Sigma~ scales with
        the variance exactly (every u scales by s2^-1/2), so dSigma~ = Sigma~. None
        otherwise (with a nugget the local conditionals change shape)."""
        if i == 0 and not self.kernel.has_nugget:
            return 1.0, 0.0
        return None

    # -- extras --------------------------------------------------------------------
    @property
    def perm(self) -> np.ndarray:
        """The maximin order: position k holds point ``perm[k]``."""
        return self._perm

    def factor_csc(self) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """(col_ptr, row positions, values) of U in maximin positions."""
        return self._ptr, self._rows, self._vals

    def _derivatives(self) -> np.ndarray:
        if self._derivs is None:
            self._derivs = _run_pass(self.kernel, self.structure, self._scaled,
                                     self._points, want_u=False, want_du=True)[1]
        return self._derivs

    #: Right-hand sides from which U B and U^-1 B gather by U's rows (``row_form``, built
    #: once and kept: U's storage again) instead of scattering by its columns; measured
    #: 5x faster for U B with 256 right-hand sides at n = 16,384 (a gather writes each
    #: output once and reads the block's rows contiguously).
    ROW_FORM_FROM = 8

    def _by_rows(self, b: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray] | None:
        if b.shape[1] < self.ROW_FORM_FROM:
            return None
        if self._rows_form is None:
            self._rows_form = row_form(self._ptr, self._rows, self._vals)
        return self._rows_form

    def _u_mul(self, x: np.ndarray) -> np.ndarray:
        """U x (x in maximin positions)."""
        rows = self._by_rows(x)
        return (u_mul(self._ptr, self._rows, self._vals, x) if rows is None
                else ut_mul(*rows, x))

    def _u_solve(self, x: np.ndarray) -> np.ndarray:
        """U^-1 x (x in maximin positions)."""
        rows = self._by_rows(x)
        return (u_solve(self._ptr, self._rows, self._vals, x) if rows is None
                else u_solve_rows(*rows, x))

    def _apply(self, b: np.ndarray, op) -> np.ndarray:
        b = np.asarray(b, dtype=float)
        if b.ndim not in (1, 2) or b.shape[0] != self.n:
            raise ValueError(f"expected an array of shape ({self.n},) or ({self.n}, k), "
                             f"got {b.shape}")
        x = np.ascontiguousarray(b.reshape(self.n, -1)[self._perm])
        y = op(x)
        out = np.empty_like(y)
        out[self._perm] = y
        return out.reshape(b.shape)


def _run_pass(kernel: Kernel, structure: VecchiaStructure, scaled: np.ndarray,
              points: np.ndarray, *, want_u: bool, want_du: bool) -> tuple[np.ndarray, np.ndarray]:
    """U's values and/or dU's (p, nnz) from the compiled pass; raises on a bad block."""
    code = kernel_code(kernel, scaled.shape[1])
    g = structure.groups
    nnz, n_sn, p = g.nnz, g.count, code.n_params
    u_vals = np.empty(nnz if want_u else 0)
    du_vals = np.empty((p, nnz) if want_du else (p, 0))
    status = np.empty(n_sn, dtype=np.int64)
    diag = np.empty(structure.n)
    none2 = np.empty((0, 0))
    supernode_pass(scaled, code.family, code.shape, code.variance, code.nugget,
                   code.ls_modes, code.has_nugget, g.member_ptr, g.members, g.set_ptr,
                   g.set_rows, g.col_ptr, want_u, u_vals, want_du, du_vals, False,
                   np.empty((structure.n, 0)), none2, np.empty((0, 0, 0, 0)), none2,
                   np.empty((0, 0, 0)), diag, status)
    check_status(status, structure, points, kernel)
    return u_vals, du_vals


def scaled_ordered(points: np.ndarray, kernel: Kernel, perm: np.ndarray) -> np.ndarray:
    """Coordinates divided by the length scale(s), in maximin order, C-contiguous."""
    return np.ascontiguousarray(kernel.scale_points(points)[perm])


def resolve_structure(points: np.ndarray, *, neighbours: int | None, rho: float | None,
                      lam: float | None, structure: VecchiaStructure | None,
                      cache: StructureCache | None) -> tuple[VecchiaStructure, bool]:
    """The structure to use and whether it was reused (passed in or cached).

    With neither ``neighbours`` nor ``rho`` given: the structure's own rule when one is
    passed, else ``DEFAULT_NEIGHBOURS``."""
    if neighbours is None and rho is None:
        if structure is not None:
            neighbours, rho = ((int(structure.value), None) if structure.rule == "neighbours"
                               else (None, structure.value))
        else:
            neighbours = DEFAULT_NEIGHBOURS
    rule, value = pattern_rule(neighbours=neighbours, rho=rho)
    given = neighbours if rule == "neighbours" else rho
    assert given is not None  # pattern_rule: exactly one was given
    (NEIGHBOURS_KNOB if rule == "neighbours" else RHO_RANGE).validate(
        given, where="vecchia solver")
    if structure is not None:
        if structure.n != points.shape[0] or structure.key != points_key(points):
            raise ValueError("vecchia solver: the structure passed was built for other "
                             "points")
        if (structure.rule, structure.value) != (rule, value) or structure.groups.lam != lam:
            raise ValueError(f"vecchia solver: the structure passed has "
                             f"{structure.describe()}, lam = {structure.groups.lam}; asked "
                             f"for {rule} = {value:g}, lam = {lam}")
        return structure, True
    if cache is not None:
        before = cache.hits
        found = cache.get(points, neighbours=neighbours, rho=rho, lam=lam)
        return found, cache.hits > before
    return build_structure(points, neighbours=neighbours, rho=rho, lam=lam), False


def factorize(points: np.ndarray, kernel: Kernel, theta: np.ndarray | None = None, *,
              tol: float | None = None, neighbours: int | None = None,
              rho: float | None = None, lam: float | None = DEFAULT_LAM,
              structure: VecchiaStructure | None = None,
              cache: StructureCache | None = None) -> VecchiaFactorization:
    """Vecchia / KL-minimizing sparse inverse Cholesky factorization of Sigma(theta).

    Parameters
    ----------
    points : ndarray, shape (n, d) or (n,)
    kernel : Kernel
        A family with a compiled closed form (``vecchia_inputs.kernel_code``).
    theta : ndarray or None
        Log-scale parameters overriding the kernel's; None keeps the kernel.
    tol : float or None
        Accepted for the protocol and ignored: this solver's knob is ``neighbours``.
    neighbours : int, optional
        m, the nearest earlier points each point conditions on (``NEIGHBOURS_KNOB``;
        ``sparsity``); m >= n - 1 conditions every point on all earlier ones (the exact
        likelihood, O(n^3)). Default ``DEFAULT_NEIGHBOURS`` unless ``rho`` is given.
    rho : float, optional
        The radius rule instead: conditioning radius in units of the maximin length
        scale, rho >= 1 (``math.inf``: every earlier point).
    lam : float >= 1 or None
        Supernode aggregation factor (``supernodes``); None: one column per set.
    structure : VecchiaStructure, optional
        Ordering, pattern and supernodes built earlier for these points (skips them).
    cache : StructureCache, optional
        Looked up (and filled) by points hash, rule and lam.

    Raises
    ------
    ValueError
        Both rules given, or the value outside its range (the message shows it);
        ``VecchiaInputError`` for duplicates under a zero nugget, a kernel without a
        compiled form, or a local block that is not positive definite (naming the point).
    """
    del tol  # the protocol's knob; this solver's is neighbours
    model = kernel if theta is None else kernel.with_theta(theta)
    x = np.asarray(points, dtype=float)
    x = x[:, None] if x.ndim == 1 else x
    kernel_code(model, x.shape[1])
    built, reused = resolve_structure(x, neighbours=neighbours, rho=rho, lam=lam,
                                      structure=structure, cache=cache)
    check_duplicates(built, x, model)
    t0 = time.perf_counter()
    scaled = scaled_ordered(x, model, built.order.perm)
    values, _ = _run_pass(model, built, scaled, x, want_u=True, want_du=False)
    t1 = time.perf_counter()
    timings = VecchiaTimings(structure=_NO_TIME if reused else built.timings, reused=reused,
                             factor=t1 - t0)
    return VecchiaFactorization(kernel=model, structure=built, points=x, scaled=scaled,
                                values=values, timings=timings)


factorize.knob = NEIGHBOURS_KNOB  # type: ignore[attr-defined]
