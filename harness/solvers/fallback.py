"""Generic completion and checking of a solver's Factorization.

A plugin must offer the required members of ``harness.solvers.protocol.Factorization``
(``n``, ``nbytes``, ``logdet``, ``solve``, ``matvec``); ``adapt`` refuses one that
lacks any, naming them. What a plugin lacks among the optional members is supplied
here and recorded in ``AdaptedFactorization.notes`` for the report:

- ``derivative_matvec(i, B)``: dense derivative blocks Sigma_i from the kernel,
  cached whole while p n^2 doubles fit in ``cache_bytes``, else assembled by row
  blocks on every call; refused beyond ``DENSE_DERIVATIVE_MAX_N`` observations,
  where each product would cost O(p n^2) kernel evaluations.
- ``solve_sqrt`` / ``apply_sqrt``: not supplied (a generic square root would need the
  dense factorization the plugin exists to avoid); ``supports_sqrt`` is then False and
  trace estimators use the non-symmetric form Sigma^-1 Sigma_i.

Every output is checked: wrong shapes and non-finite values raise ``SolverOutputError``
naming the solver and the member, instead of propagating NaN into the audit.
"""

from __future__ import annotations

import math

import numpy as np

from harness.model.kernels import Kernel
from harness.solvers.protocol import OPTIONAL_METHODS

#: Required Factorization members (``harness.solvers.protocol.Factorization``).
REQUIRED_MEMBERS: tuple[str, ...] = ("n", "nbytes", "logdet", "solve", "matvec")
#: Largest n for which dense kernel derivative blocks stand in for ``derivative_matvec``.
DENSE_DERIVATIVE_MAX_N = 8192
#: Default bytes for caching all p dense derivative blocks (beyond: row blocks per call).
DEFAULT_CACHE_BYTES = 512 * 2**20
_ROW_BLOCK = 512


class SolverProtocolError(TypeError):
    """A factorization lacks a required member, or an optional one that was asked for."""


class SolverOutputError(ValueError):
    """A factorization returned a wrong shape or a non-finite value."""


def missing_members(factorization: object) -> tuple[str, ...]:
    """Required members absent from ``factorization`` (methods must be callable)."""
    missing = []
    for name in REQUIRED_MEMBERS:
        if not hasattr(factorization, name):
            missing.append(name)
        elif name not in ("n", "nbytes") and not callable(getattr(factorization, name)):
            missing.append(name)
    return tuple(missing)


def _has_method(obj: object, name: str) -> bool:
    return callable(getattr(obj, name, None))


class AdaptedFactorization:
    """A solver's factorization with checked outputs and generic optional members.

    Parameters
    ----------
    inner : Factorization
        What the solver's factory returned.
    points : ndarray, shape (n, d)
    kernel : Kernel
        The model the factorization represents (parameters already set).
    solver : str
        Name used in messages.
    max_dense_n : int
        Limit for the generic dense derivative products.
    cache_bytes : int
        Memory allowed for caching the dense derivative blocks.

    Attributes
    ----------
    notes : tuple of str
        Which members were supplied generically or are absent.
    supports_sqrt : bool
        Whether ``solve_sqrt`` and ``apply_sqrt`` come from the solver.
    """

    def __init__(self, inner: object, points: np.ndarray, kernel: Kernel, *,
                 solver: str = "solver", max_dense_n: int = DENSE_DERIVATIVE_MAX_N,
                 cache_bytes: int = DEFAULT_CACHE_BYTES) -> None:
        self.solver = solver
        missing = missing_members(inner)
        if missing:
            have = sorted(m for m in (*REQUIRED_MEMBERS, *OPTIONAL_METHODS)
                          if hasattr(inner, m))
            raise SolverProtocolError(
                f"solver {solver!r} returned {type(inner).__name__}, which lacks required "
                f"member(s) {', '.join(missing)} of the Factorization protocol "
                f"(required: {', '.join(REQUIRED_MEMBERS)}; it has: "
                f"{', '.join(have) or 'none of them'})")
        self.inner = inner
        self.points = np.asarray(points, dtype=float)
        if self.points.ndim == 1:
            self.points = self.points[:, None]
        self.kernel = kernel
        self._n = self._check_n(inner.n)  # type: ignore[attr-defined]
        self.max_dense_n = int(max_dense_n)
        self.cache_bytes = int(cache_bytes)
        self._dense_derivatives: np.ndarray | None = None
        self.supports_sqrt = _has_method(inner, "solve_sqrt") and _has_method(inner,
                                                                                "apply_sqrt")
        self.has_derivatives = _has_method(inner, "derivative_matvec")
        notes = []
        if not self.has_derivatives:
            notes.append(f"derivative_matvec supplied generically: dense kernel derivative "
                         f"blocks (n = {self._n:,}, limit {self.max_dense_n:,})")
        if not self.supports_sqrt:
            absent = [m for m in ("solve_sqrt", "apply_sqrt") if not _has_method(inner, m)]
            notes.append(f"{'/'.join(absent)} absent: traces use the non-symmetric form "
                         "Sigma^-1 Sigma_i and whitening goes through solves")
        self.notes: tuple[str, ...] = tuple(notes)

    # -- checks ---------------------------------------------------------------------
    def _check_n(self, n: object) -> int:
        if isinstance(n, bool) or not isinstance(n, int | np.integer):
            raise SolverOutputError(f"solver {self.solver!r}: n is {n!r}; expected an int")
        if int(n) != self.points.shape[0]:
            raise SolverOutputError(
                f"solver {self.solver!r}: factorization has n = {int(n)} but there are "
                f"{self.points.shape[0]} points")
        return int(n)

    def _checked(self, member: str, b: np.ndarray, out: object) -> np.ndarray:
        arr = np.asarray(out, dtype=float)
        if arr.shape != b.shape:
            raise SolverOutputError(
                f"solver {self.solver!r}: {member} returned shape {arr.shape} for input of "
                f"shape {b.shape}; expected the input's shape")
        if not np.all(np.isfinite(arr)):
            bad = int(np.size(arr) - np.count_nonzero(np.isfinite(arr)))
            raise SolverOutputError(
                f"solver {self.solver!r}: {member} returned {bad} non-finite value(s) "
                f"(NaN or inf) of {arr.size}; the factorization is broken or Sigma is "
                "numerically singular at this tolerance")
        return arr

    def _input(self, b: np.ndarray) -> np.ndarray:
        b = np.asarray(b, dtype=float)
        if b.ndim not in (1, 2) or b.shape[0] != self._n:
            raise ValueError(f"expected an array with {self._n} rows, got shape {b.shape}")
        return b

    # -- required members -----------------------------------------------------------
    @property
    def n(self) -> int:
        return self._n

    @property
    def nbytes(self) -> int:
        value = self.inner.nbytes  # type: ignore[attr-defined]
        if isinstance(value, bool) or not isinstance(value, int | np.integer) or value < 0:
            raise SolverOutputError(
                f"solver {self.solver!r}: nbytes is {value!r}; expected an int >= 0")
        return int(value)

    def logdet(self) -> float:
        value = self.inner.logdet()  # type: ignore[attr-defined]
        try:
            number = float(value)
        except (TypeError, ValueError):
            raise SolverOutputError(
                f"solver {self.solver!r}: logdet() returned {value!r}; expected a number"
            ) from None
        if not math.isfinite(number):
            raise SolverOutputError(
                f"solver {self.solver!r}: logdet() returned {number}; expected a finite "
                "number (is Sigma~ positive definite at this tolerance?)")
        return number

    def solve(self, b: np.ndarray) -> np.ndarray:
        b = self._input(b)
        return self._checked("solve", b, self.inner.solve(b))  # type: ignore[attr-defined]

    def matvec(self, b: np.ndarray) -> np.ndarray:
        b = self._input(b)
        return self._checked("matvec", b, self.inner.matvec(b))  # type: ignore[attr-defined]

    # -- optional members -----------------------------------------------------------
    def _require_sqrt(self, member: str) -> None:
        if not self.supports_sqrt:
            raise SolverProtocolError(
                f"solver {self.solver!r} offers no {member}; use the solve-based path "
                "(check supports_sqrt first)")

    def solve_sqrt(self, b: np.ndarray) -> np.ndarray:
        """W^-1 B (only when the solver offers it; see ``supports_sqrt``)."""
        self._require_sqrt("solve_sqrt")
        b = self._input(b)
        return self._checked("solve_sqrt", b, self.inner.solve_sqrt(b))  # type: ignore[attr-defined]

    def apply_sqrt(self, b: np.ndarray) -> np.ndarray:
        """W B (only when the solver offers it)."""
        self._require_sqrt("apply_sqrt")
        b = self._input(b)
        return self._checked("apply_sqrt", b, self.inner.apply_sqrt(b))  # type: ignore[attr-defined]

    def solve_sqrt_transpose(self, b: np.ndarray) -> np.ndarray:
        """W^-T B: the solver's own when offered, else Sigma^-1 (W B)."""
        self._require_sqrt("solve_sqrt_transpose")
        b = self._input(b)
        if _has_method(self.inner, "solve_sqrt_transpose"):
            out = self.inner.solve_sqrt_transpose(b)  # type: ignore[attr-defined]
            return self._checked("solve_sqrt_transpose", b, out)
        return self.solve(self.apply_sqrt(b))

    @property
    def ranks(self) -> object:
        return getattr(self.inner, "ranks", None)

    def derivative_matvec(self, i: int, b: np.ndarray) -> np.ndarray:
        """Sigma_i B: the solver's own, or dense kernel derivative blocks (module docstring)."""
        b = self._input(b)
        p = self.kernel.n_params
        if not 0 <= int(i) < p:
            raise IndexError(f"parameter index {i} out of range for {self.kernel.param_names}")
        if self.has_derivatives:
            out = self.inner.derivative_matvec(int(i), b)  # type: ignore[attr-defined]
            return self._checked("derivative_matvec", b, out)
        return self._dense_derivative_matvec(int(i), b)

    def derivative_affine(self, i: int) -> object:
        """The solver's own declaration (a, b) with Sigma~_i = a Sigma~ + b I, or None.

        None whenever the derivative products are the generic dense ones: those are of
        the exact kernel, not of the solver's Sigma~, so no identity with Sigma~ holds.
        """
        p = self.kernel.n_params
        if not 0 <= int(i) < p:
            raise IndexError(f"parameter index {i} out of range for {self.kernel.param_names}")
        if self.has_derivatives and _has_method(self.inner, "derivative_affine"):
            return self.inner.derivative_affine(int(i))  # type: ignore[attr-defined]
        return None

    def _dense_derivative_matvec(self, i: int, b: np.ndarray) -> np.ndarray:
        n, p = self._n, self.kernel.n_params
        if n > self.max_dense_n:
            raise SolverProtocolError(
                f"solver {self.solver!r} offers no derivative_matvec and n = {n:,} exceeds "
                f"the generic dense limit of {self.max_dense_n:,} observations; implement "
                "derivative_matvec(i, B) in the solver, or audit a smaller point set")
        idx = np.arange(n)
        if 8 * p * n * n <= self.cache_bytes:
            if self._dense_derivatives is None:
                self._dense_derivatives = self.kernel.block_with_derivatives(
                    self.points, idx, idx)[1]
            return self._dense_derivatives[i] @ b
        out = np.empty((n, *b.shape[1:]))
        for r0 in range(0, n, _ROW_BLOCK):
            r1 = min(n, r0 + _ROW_BLOCK)
            out[r0:r1] = self.kernel.derivative_block(self.points, idx[r0:r1], idx, i) @ b
        return out


def adapt(factorization: object, points: np.ndarray, kernel: Kernel, *,
          solver: str = "solver", max_dense_n: int = DENSE_DERIVATIVE_MAX_N,
          cache_bytes: int = DEFAULT_CACHE_BYTES) -> AdaptedFactorization:
    """Wrap ``factorization`` (idempotent: an ``AdaptedFactorization`` is returned as is)."""
    if isinstance(factorization, AdaptedFactorization):
        return factorization
    return AdaptedFactorization(factorization, points, kernel, solver=solver,
                                max_dense_n=max_dense_n, cache_bytes=cache_bytes)
