"""Compiled kernel tiles for the exact products, with a vectorizable exponential.

numba without Intel's SVML calls the scalar libm ``exp`` per entry, which made filling a
tile cost as much as the two tile products. The families built on exp(-a) (exponential,
Matern 3/2 and 5/2, Gaussian) are filled here row by row in three loops the compiler
vectorizes:

1. squared scaled distance q, the argument x = -a (clamped at -708), the Cody-Waite
   reduction x = k ln 2 + r, |r| <= ln(2)/2, and the degree-13 Taylor polynomial of
   exp(r) (truncation below 5e-18 relative: 0.347^14 / 14!);
2. 2^k from the integer k by its IEEE-754 bit pattern ((k + 1023) << 52), k having been
   rounded by adding and subtracting 1.5 * 2^52 (the "shifter" rounding trick; Muller
   2016, *Elementary Functions*, 3rd ed., ch. 11, "from memory");
3. the family's closed form from a and exp(-a) (``harness.model.kernels.radial``).

The result agrees with libm exp to a few units in the last place; entries whose exact
value is below 1e-300 are set to 0. Compiled without reassociation (the rounding trick
needs the additions in the written order). Other families and modes use
``harness.model.kernels.rows.fill_block``.
"""

from __future__ import annotations

import math

import numba
import numpy as np

from harness.model.kernels import Kernel
from harness.model.kernels.rows import COORD, SLOPE, VALUE, fill_block

_SAFE = {"nnan", "ninf", "nsz", "arcp", "contract", "afn"}   # no "reassoc"
_LOG2E = 1.4426950408889634
_LN2_HI = 0.6931471803691238
_LN2_LO = 1.9082149292705877e-10
_SHIFTER = 6755399441055744.0            # 1.5 * 2^52
_SHIFTER_BITS = np.int64(0x4338000000000000)
_SQRT3 = math.sqrt(3.0)
_SQRT5 = math.sqrt(5.0)
_CUTOFF = 708.0

#: compiled family codes (``rows.FAMILY_CODES``) this module fills itself
FAST_FAMILIES = (0, 1, 2, 3)


@numba.njit(fastmath=_SAFE, cache=True, nogil=True)
def _exp_row(x_row, mant, bits, n):
    """mant[j] * (bits viewed as float)[j] = exp(x_row[j]) after ``_finish``; x <= 0."""
    for j in range(n):
        x = x_row[j]
        if x < -_CUTOFF:
            x = -_CUTOFF
        t = x * _LOG2E + _SHIFTER
        kf = t - _SHIFTER
        r = (x - kf * _LN2_HI) - kf * _LN2_LO
        p = 1.0 / 6227020800.0
        p = p * r + 1.0 / 479001600.0
        p = p * r + 1.0 / 39916800.0
        p = p * r + 1.0 / 3628800.0
        p = p * r + 1.0 / 362880.0
        p = p * r + 1.0 / 40320.0
        p = p * r + 1.0 / 5040.0
        p = p * r + 1.0 / 720.0
        p = p * r + 1.0 / 120.0
        p = p * r + 1.0 / 24.0
        p = p * r + 1.0 / 6.0
        p = p * r + 0.5
        p = p * r + 1.0
        p = p * r + 1.0
        mant[j] = p
        bits[j] = t


@numba.njit(fastmath=_SAFE, cache=True, nogil=True)
def _pow2_row(ibits, n):
    for j in range(n):
        ibits[j] = (ibits[j] - _SHIFTER_BITS + 1023) << 52


@numba.njit(fastmath=_SAFE, cache=True, nogil=True)
def fill_tile(family, xs, ys, shape, scale, mode, out):
    """out[i, j] = entry(xs_i, ys_j) of the matrix selected by ``mode`` (``rows`` modes)."""
    if family not in FAST_FAMILIES:
        fill_block(family, xs, ys, shape, scale, mode, out)
        return
    m, d = xs.shape
    n = ys.shape[0]
    q_row = np.empty(n)
    x_row = np.empty(n)
    mant = np.empty(n)
    bits = np.empty(n)
    ibits = bits.view(np.int64)
    if family == 0:
        c = 1.0
    elif family == 1:
        c = _SQRT3
    elif family == 2:
        c = _SQRT5
    else:
        c = 0.0
    for i in range(m):
        for j in range(n):
            q = 0.0
            for k in range(d):
                t = xs[i, k] - ys[j, k]
                q += t * t
            q_row[j] = q
            if family == 3:
                x_row[j] = -0.5 * q
            else:
                x_row[j] = -c * math.sqrt(q)
        _exp_row(x_row, mant, bits, n)
        _pow2_row(ibits, n)
        row = out[i]
        for j in range(n):
            x = x_row[j]
            e = mant[j] * bits[j]
            a = -x
            if family == 0:
                value = e
                slope = a * e
            elif family == 1:
                value = (1.0 + a) * e
                slope = a * a * e
            elif family == 2:
                value = (1.0 + a + a * a / 3.0) * e
                slope = a * a * (1.0 + a) * e / 3.0
            else:
                value = e
                slope = q_row[j] * e
            if mode == VALUE:
                v = value
            else:
                v = slope
            if x < -_CUTOFF:
                v = 0.0
            row[j] = scale * v
        if mode >= COORD:
            ck = mode - COORD
            for j in range(n):
                q = q_row[j]
                if q > 0.0:
                    t = xs[i, ck] - ys[j, ck]
                    row[j] = row[j] * (t * t) / q
                else:
                    row[j] = 0.0


def kernel_modes(kernel: Kernel, which: tuple[int, ...]) -> np.ndarray:
    """Compiled entry modes for the parameters ``which`` (-1: the value s2 R)."""
    k = len(kernel.lengthscale)
    modes = []
    for i in which:
        if i in (-1, 0):
            modes.append(VALUE)
        elif 1 <= i <= k:
            modes.append(SLOPE if kernel.isotropic else COORD + (i - 1))
        else:
            raise ValueError(f"parameter {i} has no kernel-entry mode (nugget is diagonal)")
    return np.asarray(modes, dtype=np.int64)


__all__ = ["COORD", "FAST_FAMILIES", "SLOPE", "VALUE", "fill_tile", "kernel_modes"]
