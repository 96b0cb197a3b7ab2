"""Families of linear operators A_1..A_p whose traces are estimated from one probe block.

For the score of a Gaussian likelihood the operators are A_i = Sigma^-1 Sigma_i
(Sigma_i = dSigma/dtheta_i). With a symmetric factorization Sigma = W W' the similar
matrix W^-1 Sigma_i W^-T has the same trace and is symmetric, which Hutch++ and the
Fisher estimator below prefer; ``FactorizationOperators`` uses it whenever the
factorization offers ``solve_sqrt`` and ``apply_sqrt`` (W^-T Z is then
``solve_sqrt_transpose(Z)`` when offered, else Sigma^-1 W Z = W^-T Z, one solve and one
W product). Otherwise it falls back to the non-symmetric Sigma^-1 Sigma_i and says so
in ``notes``.

Cost accounting (``Usage``): ``matvecs`` counts columns multiplied by a derivative
Sigma_i (or by an explicit A_i), ``solves`` counts columns passed through a factor
operation (``solve``, ``solve_sqrt``, ``solve_sqrt_transpose``, ``apply_sqrt``).
"""

from __future__ import annotations

from collections.abc import Callable, Collection, Sequence
from dataclasses import dataclass
from typing import Protocol, cast

import numpy as np

from harness.solvers.protocol import Factorization, SymmetricFactorization

DerivativeMatvec = Callable[[int, np.ndarray], np.ndarray]


@dataclass
class Usage:
    """Running count of operator columns applied (mutable; read before and after)."""

    solves: int = 0
    matvecs: int = 0


class OperatorFamily(Protocol):
    """p operators of order n applied to blocks; ``symmetric`` says A_i' = A_i."""

    n: int
    count: int
    symmetric: bool
    usage: Usage
    notes: tuple[str, ...]

    def apply_all(self, z: np.ndarray) -> np.ndarray:
        """A_i Z for every i, stacked (p, n, k), from one (n, k) block."""
        ...

    def quadratic_each(self, blocks: np.ndarray) -> np.ndarray:
        """b' A_i b for every column b of block i of a stack (p, n, k): shape (p, k)."""
        ...

    def apply_all_adjoint(self, z: np.ndarray) -> np.ndarray:
        """A_i' Z for every i, stacked (p, n, k)."""
        ...


def _split(block: np.ndarray, parts: int) -> np.ndarray:
    """(n, parts * k) -> (parts, n, k), column groups in order."""
    n, width = block.shape
    k = width // parts
    return np.ascontiguousarray(block.reshape(n, parts, k).transpose(1, 0, 2))


def _join(stack: np.ndarray) -> np.ndarray:
    """(parts, n, k) -> (n, parts * k), the inverse of ``_split``."""
    parts, n, k = stack.shape
    return np.ascontiguousarray(stack.transpose(1, 0, 2).reshape(n, parts * k))


class ExplicitOperators:
    """A family given by explicit matrices, shape (p, n, n) (tests, small problems).

    Products loop over the operators with 2-D BLAS calls: numpy's stacked ``@`` was 25x
    slower on a 2-core machine under load (measured, (3, 200, 200) @ (200, 16)).
    """

    def __init__(self, matrices: np.ndarray | Sequence[np.ndarray]) -> None:
        mats = np.asarray(matrices, dtype=np.float64)
        if mats.ndim == 2:
            mats = mats[None]
        if mats.ndim != 3 or mats.shape[1] != mats.shape[2]:
            raise ValueError(f"expected square matrices stacked (p, n, n), got {mats.shape}")
        self.matrices = mats
        self.count, self.n = int(mats.shape[0]), int(mats.shape[1])
        self.symmetric = bool(np.allclose(mats, mats.transpose(0, 2, 1), rtol=0.0,
                                          atol=1e-13 * max(1.0, float(np.abs(mats).max()))))
        self.usage = Usage()
        self.notes: tuple[str, ...] = ()

    def apply_all(self, z: np.ndarray) -> np.ndarray:
        self.usage.matvecs += self.count * z.shape[1]
        return np.stack([m @ z for m in self.matrices])

    def quadratic_each(self, blocks: np.ndarray) -> np.ndarray:
        self.usage.matvecs += blocks.shape[0] * blocks.shape[2]
        return np.stack([np.sum(b * (m @ b), axis=0)
                         for m, b in zip(self.matrices, blocks, strict=True)])

    def apply_all_adjoint(self, z: np.ndarray) -> np.ndarray:
        self.usage.matvecs += self.count * z.shape[1]
        return np.stack([m.T @ z for m in self.matrices])


class FactorizationOperators:
    """A_i = Sigma^-1 Sigma_i through a Factorization and a derivative matvec.

    Parameters
    ----------
    factorization : Factorization
        Offers ``solve`` and, for the symmetric form, ``solve_sqrt`` and ``apply_sqrt``.
    derivative_matvec : callable
        ``derivative_matvec(i, B) = Sigma_i @ B`` for i in ``range(count)``.
    count : int
        Number of parameters p.
    symmetric : bool, optional
        Force the form; by default symmetric exactly when the square-root methods exist.
    identity_slots : collection of int
        Operators whose "derivative" is the identity (A_i = Sigma^-1, or W^-1 W^-T in
        the symmetric form; ``affine`` module): never passed to ``derivative_matvec``
        and not counted as derivative products.

    Notes
    -----
    Symmetric form: A_i = W^-1 Sigma_i W^-T. One block Z gives all p products with one
    W^-T application (``apply_all``): X = W^-T Z, then Sigma_i X, then W^-1 on the
    stacked columns. Quadratic forms need no W^-1: z' A_i z = x' Sigma_i x.
    Non-symmetric form: A_i Z = Sigma^-1 (Sigma_i Z) with all p blocks solved together;
    the adjoint is A_i' Z = Sigma_i Sigma^-1 Z.
    """

    def __init__(self, factorization: Factorization, derivative_matvec: DerivativeMatvec,
                 count: int, *, symmetric: bool | None = None,
                 identity_slots: Collection[int] = ()) -> None:
        self.factorization = factorization
        self.derivative_matvec = derivative_matvec
        self.count = int(count)
        self.identity_slots = frozenset(int(i) for i in identity_slots)
        if not self.identity_slots <= set(range(self.count)):
            raise ValueError(f"identity_slots {sorted(self.identity_slots)} outside the "
                             f"{self.count} operators")
        self.n = int(factorization.n)
        has_sqrt = (callable(getattr(factorization, "solve_sqrt", None))
                    and callable(getattr(factorization, "apply_sqrt", None)))
        supports = getattr(factorization, "supports_sqrt", None)
        if isinstance(supports, bool):
            has_sqrt = supports
        if symmetric and not has_sqrt:
            raise ValueError("the symmetric form needs a factorization with solve_sqrt and "
                             "apply_sqrt")
        self.symmetric = has_sqrt if symmetric is None else bool(symmetric)
        self.usage = Usage()
        if self.symmetric:
            self.notes: tuple[str, ...] = (
                "traces of the symmetric form W^-1 Sigma_i W^-T (Sigma = W W')",)
        else:
            self.notes = ("factorization offers no solve_sqrt/apply_sqrt: traces of the "
                          "non-symmetric form Sigma^-1 Sigma_i",)

    # -- factor operations, counted -------------------------------------------------
    def _solve(self, b: np.ndarray) -> np.ndarray:
        self.usage.solves += b.shape[1]
        return np.asarray(self.factorization.solve(b), dtype=np.float64)

    def _solve_sqrt(self, b: np.ndarray) -> np.ndarray:
        self.usage.solves += b.shape[1]
        return np.asarray(cast(SymmetricFactorization, self.factorization).solve_sqrt(b),
                          dtype=np.float64)

    def _solve_sqrt_transpose(self, b: np.ndarray) -> np.ndarray:
        """W^-T B: directly when offered, else Sigma^-1 (W B) (W^-T = Sigma^-1 W)."""
        direct = getattr(self.factorization, "solve_sqrt_transpose", None)
        if callable(direct):
            self.usage.solves += b.shape[1]
            return np.asarray(direct(b), dtype=np.float64)
        self.usage.solves += b.shape[1]
        wb = np.asarray(cast(SymmetricFactorization, self.factorization).apply_sqrt(b),
                        dtype=np.float64)
        return self._solve(wb)

    def _derivatives(self, blocks: np.ndarray) -> np.ndarray:
        out = np.empty_like(blocks)
        for i in range(blocks.shape[0]):
            if i in self.identity_slots:
                out[i] = blocks[i]
                continue
            self.usage.matvecs += blocks.shape[2]
            out[i] = self.derivative_matvec(i, blocks[i])
        return out

    # -- OperatorFamily -------------------------------------------------------------
    def apply_all(self, z: np.ndarray) -> np.ndarray:
        z = np.asarray(z, dtype=np.float64)
        if self.symmetric:
            x = self._solve_sqrt_transpose(z)
            stack = self._derivatives(np.broadcast_to(x, (self.count, *x.shape)))
            return _split(self._solve_sqrt(_join(stack)), self.count)
        stack = self._derivatives(np.broadcast_to(z, (self.count, *z.shape)))
        return _split(self._solve(_join(stack)), self.count)

    def quadratic_each(self, blocks: np.ndarray) -> np.ndarray:
        """Symmetric form: b' W^-1 Sigma_i W^-T b = x' Sigma_i x with x = W^-T b, so one
        W^-T pass and the derivative products, no W^-1 pass; non-symmetric form:
        b' Sigma^-1 (Sigma_i b)."""
        blocks = np.asarray(blocks, dtype=np.float64)
        parts = blocks.shape[0]
        if self.symmetric:
            x = _split(self._solve_sqrt_transpose(_join(blocks)), parts)
            return np.sum(x * self._derivatives(x), axis=1)
        return np.sum(blocks * _split(self._solve(_join(self._derivatives(blocks))), parts),
                      axis=1)

    def apply_all_adjoint(self, z: np.ndarray) -> np.ndarray:
        if self.symmetric:
            return self.apply_all(z)
        s = self._solve(np.asarray(z, dtype=np.float64))
        return self._derivatives(np.broadcast_to(s, (self.count, *s.shape)))
