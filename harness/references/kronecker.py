"""Exact likelihood, traces and Fisher information of separable kernels on tensor grids.

The separable (product) model on a d-dimensional tensor grid is

    Sigma = s2 (R_1 kron R_2 [kron R_3]) + tau2 I,
    R_k[a, b] = rho(|x_a - x_b| / l_k),

with rho the 1D correlation of a kernel family. This is a *different model* from the
isotropic or anisotropic kernel of the same family: the product of 1D Matern
correlations is not a Matern correlation of the Euclidean distance (the two agree only
for the Gaussian family, whose product of 1D factors is the anisotropic Gaussian). A
separable kernel is therefore its own object here, ``SeparableKernel(factor)``, where
``factor`` is an ordinary ``Kernel`` whose family gives the 1D factors, whose variance
and nugget are s2 and tau2, and whose length scale is shared by all axes (one value) or
given per axis (d values).

With the eigen-decompositions R_k = U_k diag(lam_k) U_k' (Saatci 2012, PhD thesis,
*Scalable Inference for Structured Gaussian Process Models*, section 5.2; Wilson et
al. 2014, "Fast kernel learning for multidimensional pattern extrapolation", eq. 5)

    Sigma = U diag(e) U',  U = kron_k U_k,  e = s2 kron_k lam_k + tau2,

so log det Sigma = sum log e, Sigma^-1 b = U (U' b / e), and W = U diag(sqrt e) is a
square root (Sigma = W W'), W^-1 b = (U' b) / sqrt(e). Products with a Kronecker matrix
are mode-wise matrix products (never forming it), O(n sum_k n_k) for n = prod_k n_k.

Derivatives, in the eigenbasis (B_i = U' Sigma_i U):

* log s2:   B = diag(e - tau2);            log tau2:  B = diag(tau2)
* log l_k:  B = s2 (.. diag lam_j .. kron M_k kron ..), M_k = U_k' (dR_k/dlog l_k) U_k,
  with dR_k/dlog l_k [a, b] = s(r) = -r rho'(r) at r = |x_a - x_b| / l_k;
  an isotropic length scale is the sum over k.

Hence tr(Sigma^-1 Sigma_i) = sum diag(B_i) / e. For the Fisher information
F_ij = 1/2 tr(Sigma^-1 Sigma_i Sigma^-1 Sigma_j) = 1/2 sum_pq B_i[p,q] B_j[q,p] / (e_p e_q):
B_i[p, q] for log l_k is non-zero only where p and q differ at most in axis k, so every
pair except (l_k, l_k) reduces to 1/2 sum_p diag(B_i)_p diag(B_j)_p / e_p^2, and

    F(l_k, l_k) = 1/2 sum_o V_o' (M_k o M_k) V_o,  V = s2 (kron_{j != k} lam_j) / e,

the sum running over the lines o of the grid along axis k (o: Hadamard product). The
whole Fisher matrix costs O(n sum_k n_k), so it is exact at a million points. REML
replaces Sigma^-1 by P = Sigma^-1 - G C G', G = Sigma^-1 F, C = (F' Sigma^-1 F)^-1:
tr(P Sigma_i) = tr(Sigma^-1 Sigma_i) - tr(C G' Sigma_i G) and
tr(P Sigma_i P Sigma_j) = tr(Sigma^-1 Sigma_i Sigma^-1 Sigma_j)
- 2 tr(C G' Sigma_i Sigma^-1 Sigma_j G) + tr(C G' Sigma_i G C G' Sigma_j G)
(expanding the product; Harville 1977, JASA 72, section 4 for the REML score and
information).
"""

from __future__ import annotations

import time
from dataclasses import dataclass

import numpy as np

from harness.model.evaluation import ModelEvaluation
from harness.model.gls import gls_loglik
from harness.model.kernels.classes import Kernel, KernelParameterError
from harness.model.mean import design_matrix
from harness.references.gridcheck import GridLayout, detect_grid

#: Largest number of distinct values along one axis: each axis costs a dense
#: eigen-decomposition of size n_k (O(n_k^3) time, O(n_k^2) memory).
MAX_AXIS_SIZE = 8000


class KroneckerError(ValueError):
    """Input the Kronecker reference cannot handle (no grid, axis too long, singular)."""


@dataclass(frozen=True)
class SeparableKernel:
    """The product kernel s2 prod_k rho(|d_k| / l_k) + tau2 [same observation].

    Parameters
    ----------
    factor : Kernel
        Gives the 1D correlation family (and its shape parameter), s2, tau2 and the
        length scale: one value shared by all axes, or one per axis.

    ``theta``, ``param_names`` and ``with_theta`` are those of ``factor``: (log s2,
    log l or log l_1..l_d, log tau2 when tau2 > 0). ``block`` and
    ``block_with_derivatives`` follow the ``Kernel`` contract, so a compressed solver
    can be audited on the separable model.
    """

    factor: Kernel

    def __post_init__(self) -> None:
        if not isinstance(self.factor, Kernel):
            raise KernelParameterError(
                f"factor: expected a Kernel instance, got {type(self.factor).__name__}"
            )

    @property
    def family(self) -> str:
        return f"separable_{self.factor.family}"

    @property
    def variance(self) -> float:
        return self.factor.variance

    @property
    def nugget(self) -> float:
        return self.factor.nugget

    @property
    def lengthscale(self) -> tuple[float, ...]:
        return self.factor.lengthscale

    @property
    def isotropic(self) -> bool:
        return self.factor.isotropic

    @property
    def has_nugget(self) -> bool:
        return self.factor.has_nugget

    @property
    def param_names(self) -> tuple[str, ...]:
        return self.factor.param_names

    @property
    def n_params(self) -> int:
        return self.factor.n_params

    @property
    def theta(self) -> np.ndarray:
        return self.factor.theta

    def with_theta(self, theta: np.ndarray) -> SeparableKernel:
        return SeparableKernel(self.factor.with_theta(theta))

    def natural_params(self) -> dict[str, object]:
        return {**self.factor.natural_params(), "separable": True}

    def describe(self) -> str:
        return f"separable {self.factor.describe()}"

    def axis_lengthscales(self, d: int) -> tuple[float, ...]:
        """l_1..l_d: the shared length scale repeated, or the per-axis values."""
        self.factor.check_dimension(d)
        return self.factor.lengthscale * d if self.isotropic else self.factor.lengthscale

    def factor_matrices(self, a: np.ndarray, b: np.ndarray, axis_lengthscale: float
                        ) -> tuple[np.ndarray, np.ndarray]:
        """1D correlation rho(|a_i - b_j| / l) and its log-l derivative s(r)."""
        r = np.abs(np.subtract.outer(np.asarray(a, float), np.asarray(b, float))) / axis_lengthscale
        return self.factor.radial(r)

    def cross_covariance(self, points_a: np.ndarray, points_b: np.ndarray) -> np.ndarray:
        """s2 prod_k rho_k(points_a, points_b), without nugget."""
        return _product_block(self, _as_points(points_a), _as_points(points_b), False)[0]

    def block(self, points: np.ndarray, rows: np.ndarray, cols: np.ndarray) -> np.ndarray:
        """Sigma[rows, cols] (nugget where a row index equals a column index)."""
        rows, cols = np.asarray(rows, np.intp), np.asarray(cols, np.intp)
        pts = _as_points(points)
        out = self.cross_covariance(pts[rows], pts[cols])
        _add_on_matches(out, rows, cols, self.nugget)
        return out

    def block_with_derivatives(self, points: np.ndarray, rows: np.ndarray, cols: np.ndarray
                               ) -> tuple[np.ndarray, np.ndarray]:
        return separable_block_with_derivatives(points, rows, cols, self)

    def derivative_block(self, points: np.ndarray, rows: np.ndarray, cols: np.ndarray,
                         i: int) -> np.ndarray:
        """dSigma/dtheta_i[rows, cols] for one parameter index i."""
        if not 0 <= i < self.n_params:
            raise IndexError(f"parameter index {i} out of range for {self.param_names}")
        return self.block_with_derivatives(points, rows, cols)[1][i]

    def check_dimension(self, d: int) -> None:
        self.factor.check_dimension(d)

    def covariance(self, points: np.ndarray) -> np.ndarray:
        """The whole separable Sigma at ``points`` (small n only)."""
        idx = np.arange(_as_points(points).shape[0])
        return self.block(points, idx, idx)


def _as_points(points: np.ndarray) -> np.ndarray:
    pts = np.asarray(points, dtype=float)
    return pts[:, None] if pts.ndim == 1 else pts


def _as_separable(kernel: Kernel | SeparableKernel) -> SeparableKernel:
    return kernel if isinstance(kernel, SeparableKernel) else SeparableKernel(kernel)


def _add_on_matches(out: np.ndarray, rows: np.ndarray, cols: np.ndarray, value: float) -> None:
    if value != 0.0:
        _, ia, ib = np.intersect1d(rows, cols, return_indices=True)
        out[ia, ib] += value


def _product_block(kernel: SeparableKernel, xa: np.ndarray, xb: np.ndarray,
                   with_derivatives: bool) -> tuple[np.ndarray, np.ndarray | None]:
    d = xa.shape[1]
    ls = kernel.axis_lengthscales(d)
    rhos, slopes = [], []
    for k in range(d):
        rho, s = kernel.factor_matrices(xa[:, k], xb[:, k], ls[k])
        rhos.append(rho)
        slopes.append(s)
    value = kernel.variance * np.prod(rhos, axis=0)
    if not with_derivatives:
        return value, None
    per_axis = np.empty((d,) + value.shape)
    for k in range(d):
        others = [rhos[j] for j in range(d) if j != k]
        per_axis[k] = kernel.variance * slopes[k] * (np.prod(others, axis=0) if others else 1.0)
    return value, per_axis


def separable_covariance(points: np.ndarray, kernel: Kernel | SeparableKernel) -> np.ndarray:
    """The dense separable covariance s2 prod_k R_k + tau2 I at ``points`` (small n)."""
    return _as_separable(kernel).covariance(points)


def separable_block_with_derivatives(points: np.ndarray, rows: np.ndarray, cols: np.ndarray,
                                     kernel: Kernel | SeparableKernel
                                     ) -> tuple[np.ndarray, np.ndarray]:
    """Sigma[rows, cols] of the separable model and dSigma/dtheta_i[rows, cols], (p, m, n).

    Derivatives: d/dlog s2 = s2 prod_k rho_k; d/dlog l_k = s2 s_k prod_{j != k} rho_j
    (summed over k for a shared length scale); d/dlog tau2 = tau2 on matching indices.
    """
    sep = _as_separable(kernel)
    rows, cols = np.asarray(rows, np.intp), np.asarray(cols, np.intp)
    pts = _as_points(points)
    value, per_axis = _product_block(sep, pts[rows], pts[cols], True)
    if per_axis is None:
        raise RuntimeError("per-axis derivatives were asked for and not returned")
    derivs = np.empty((sep.n_params,) + value.shape)
    derivs[0] = value
    if sep.isotropic:
        derivs[1] = per_axis.sum(axis=0)
        k_end = 2
    else:
        derivs[1:1 + per_axis.shape[0]] = per_axis
        k_end = 1 + per_axis.shape[0]
    if sep.has_nugget:
        derivs[k_end] = 0.0
        _add_on_matches(derivs[k_end], rows, cols, sep.nugget)
    value = value.copy()
    _add_on_matches(value, rows, cols, sep.nugget)
    return value, derivs


def _mode(x: np.ndarray, matrix: np.ndarray, axis: int) -> np.ndarray:
    """Multiply the grid array ``x`` by ``matrix`` along ``axis`` (a mode-k product)."""
    return np.moveaxis(np.tensordot(matrix, x, axes=([1], [axis])), 0, axis)


def _outer(vectors: list[np.ndarray]) -> np.ndarray:
    out = vectors[0]
    for v in vectors[1:]:
        out = np.multiply.outer(out, v)
    return out


class KroneckerReference:
    """Exact Gaussian likelihood of a separable kernel on a tensor grid (module docstring).

    Parameters
    ----------
    points : ndarray, shape (n, d), d = 1, 2 or 3
        A complete tensor grid in any order (``harness.references.gridcheck``).
    kernel : SeparableKernel
        The product model. A plain ``Kernel`` is refused: wrap it as
        ``SeparableKernel(kernel)`` to state that the product model is meant.

    Cost: one dense eigen-decomposition per axis (O(n_k^3)), then O(n sum_k n_k) per
    solve, derivative product, trace set or Fisher matrix. Axes longer than
    ``MAX_AXIS_SIZE`` are refused.
    """

    def __init__(self, points: np.ndarray, kernel: SeparableKernel) -> None:
        if not isinstance(kernel, SeparableKernel):
            raise KroneckerError(
                f"kernel: the Kronecker reference models the separable (product) kernel; "
                f"got {type(kernel).__name__} {getattr(kernel, 'describe', lambda: '')()}. "
                f"Wrap it as SeparableKernel(kernel) if the product model is meant (it is "
                f"not the isotropic kernel of the same family)"
            )
        pts = _as_points(points)
        if not 1 <= pts.shape[1] <= 3:
            raise KroneckerError(f"points: expected d = 1, 2 or 3 coordinates, got {pts.shape[1]}")
        self._points = pts
        self.layout: GridLayout = detect_grid(pts)
        self.kernel = kernel
        longest = max(self.layout.shape)
        if longest > MAX_AXIS_SIZE:
            raise KroneckerError(
                f"points: grid {self.layout.shape} has an axis of {longest} values; the "
                f"Kronecker reference decomposes each axis densely and accepts at most "
                f"{MAX_AXIS_SIZE} per axis"
            )
        d = pts.shape[1]
        ls = kernel.axis_lengthscales(d)
        self._corr, self._dcorr, self._lam, self._vec, self._mk = [], [], [], [], []
        for k, axis in enumerate(self.layout.axes):
            rho, slope = kernel.factor_matrices(axis, axis, ls[k])
            lam, vec = np.linalg.eigh(rho)
            self._corr.append(rho)
            self._dcorr.append(slope)
            self._lam.append(lam)
            self._vec.append(vec)
            self._mk.append(vec.T @ slope @ vec)
        s2, tau2 = kernel.variance, kernel.nugget
        self._signal = s2 * _outer(self._lam)
        self._eig = self._signal + tau2
        smallest = float(self._eig.min())
        if not smallest > 0.0:
            raise KroneckerError(
                f"singular: smallest eigenvalue of Sigma is {smallest:.3g} <= 0 (grid "
                f"{self.layout.shape}, {kernel.describe()}); add a nugget"
            )

    # -- basic linear algebra ---------------------------------------------------------
    @property
    def n(self) -> int:
        return self.layout.n

    @property
    def d(self) -> int:
        return len(self.layout.shape)

    @property
    def eigenvalues(self) -> np.ndarray:
        """e = s2 kron_k lam_k + tau2, grid-shaped."""
        return self._eig

    def _check_values(self, values: np.ndarray, name: str) -> np.ndarray:
        v = np.asarray(values, dtype=float)
        if v.shape[:1] != (self.n,) or v.ndim > 2:
            raise KroneckerError(
                f"{name}: expected shape ({self.n},) or ({self.n}, k), got {v.shape}")
        return v

    def _rotate(self, g: np.ndarray, transpose: bool) -> np.ndarray:
        for k, vec in enumerate(self._vec):
            g = _mode(g, vec.T if transpose else vec, k)
        return g

    def _kron_apply(self, g: np.ndarray, mats: list[np.ndarray]) -> np.ndarray:
        for k, mat in enumerate(mats):
            g = _mode(g, mat, k)
        return g

    def _grid(self, v: np.ndarray) -> np.ndarray:
        return self.layout.to_grid(v.reshape(self.n, -1))

    def _eig_b(self) -> np.ndarray:
        return self._eig[..., None]

    def logdet(self) -> float:
        """log det Sigma = sum log e."""
        return float(np.sum(np.log(self._eig)))

    def solve(self, values: np.ndarray) -> np.ndarray:
        """Sigma^-1 B, in the order of ``points``."""
        v = self._check_values(values, "values")
        g = self._rotate(self._rotate(self._grid(v), True) / self._eig_b(), False)
        out = self.layout.from_grid(g)
        return out[:, 0] if v.ndim == 1 else out

    def matvec(self, values: np.ndarray) -> np.ndarray:
        """Sigma B, in the order of ``points``."""
        v = self._check_values(values, "values")
        g = self._grid(v)
        out = self.kernel.variance * self._kron_apply(g, self._corr) + self.kernel.nugget * g
        out = self.layout.from_grid(out)
        return out[:, 0] if v.ndim == 1 else out

    def whiten(self, values: np.ndarray) -> np.ndarray:
        """W^-1 B = diag(e^-1/2) U' B, rows in eigenbasis order (W = U diag(sqrt e))."""
        v = self._check_values(values, "values")
        g = self._rotate(self._grid(v), True) / np.sqrt(self._eig_b())
        out = g.reshape(self.n, -1)
        return out[:, 0] if v.ndim == 1 else out

    # -- derivatives ------------------------------------------------------------------
    def _basic_names(self) -> list[str]:
        names = ["log_variance"] + [f"axis_{k}" for k in range(self.d)]
        return names + (["log_nugget"] if self.kernel.has_nugget else [])

    def _param_map(self) -> np.ndarray:
        """T (n_basic, n_params): param j = sum_b T[b, j] basic b."""
        nb, npar = len(self._basic_names()), self.kernel.n_params
        t = np.zeros((nb, npar))
        t[0, 0] = 1.0
        if self.kernel.isotropic:
            t[1:1 + self.d, 1] = 1.0
        else:
            t[1:1 + self.d, 1:1 + self.d] = np.eye(self.d)
        if self.kernel.has_nugget:
            t[-1, -1] = 1.0
        return t

    def _basic_matvec(self, b: int, g: np.ndarray) -> np.ndarray:
        s2 = self.kernel.variance
        if b == 0:
            return s2 * self._kron_apply(g, self._corr)
        if b <= self.d:
            mats = list(self._corr)
            mats[b - 1] = self._dcorr[b - 1]
            return s2 * self._kron_apply(g, mats)
        return self.kernel.nugget * g

    def derivative_matvec(self, i: int, values: np.ndarray) -> np.ndarray:
        """dSigma/dtheta_i B, in the order of ``points``."""
        if not 0 <= i < self.kernel.n_params:
            raise IndexError(f"parameter index {i} out of range for {self.kernel.param_names}")
        v = self._check_values(values, "values")
        g = self._grid(v)
        col = self._param_map()[:, i]
        summed = np.zeros_like(g)
        for b in np.flatnonzero(col):
            summed = summed + self._basic_matvec(int(b), g)
        out = self.layout.from_grid(summed)
        return out[:, 0] if v.ndim == 1 else out

    def _basic_diagonals(self) -> list[np.ndarray]:
        """diag(U' Sigma_b U) of each basic derivative, grid-shaped."""
        diags = [self._signal]
        for k in range(self.d):
            vecs = list(self._lam)
            vecs[k] = np.diag(self._mk[k])
            diags.append(self.kernel.variance * _outer(vecs))
        if self.kernel.has_nugget:
            diags.append(np.full(self._eig.shape, self.kernel.nugget))
        return diags

    def trace_terms(self) -> np.ndarray:
        """tr(Sigma^-1 dSigma/dtheta_i), exact, in ``param_names`` order."""
        basic = np.array([float(np.sum(dg / self._eig)) for dg in self._basic_diagonals()])
        return basic @ self._param_map()

    def fisher(self) -> np.ndarray:
        """Expected Fisher information 1/2 tr(Sigma^-1 Sigma_i Sigma^-1 Sigma_j), exact."""
        diags = self._basic_diagonals()
        nb = len(diags)
        fb = np.empty((nb, nb))
        for a in range(nb):
            for b in range(a, nb):
                fb[a, b] = fb[b, a] = 0.5 * float(np.sum(diags[a] * diags[b] / self._eig ** 2))
        for k in range(self.d):
            vecs = list(self._lam)
            vecs[k] = np.ones_like(self._lam[k])
            v = self.kernel.variance * _outer(vecs) / self._eig
            fb[1 + k, 1 + k] = 0.5 * float(np.sum(v * _mode(v, self._mk[k] ** 2, k)))
        t = self._param_map()
        return t.T @ fb @ t

    # -- likelihood -------------------------------------------------------------------
    def evaluate(self, y: np.ndarray, *, mean: str = "zero", reml: bool = False,
                 score: bool = True, fisher: bool = False) -> ModelEvaluation:
        """Exact log-likelihood, analytic score and traces, optional exact Fisher.

        Score g_i = 1/2 a' Sigma_i a - 1/2 tr(P Sigma_i) with a = Sigma^-1 (y - F beta)
        (= P y), P = Sigma^-1 for ML (Rasmussen and Williams 2006, eq. 5.9) and the
        REML projection otherwise (module docstring). ``trace_terms`` holds
        tr(P Sigma_i) and ``fisher`` 1/2 tr(P Sigma_i P Sigma_j).
        """
        y = np.asarray(y, dtype=float)
        if y.shape != (self.n,):
            raise KroneckerError(f"y: expected shape ({self.n},), got {y.shape}")
        t0 = time.perf_counter()
        design = design_matrix(self._points, mean)
        p = design.shape[1]
        wf = self.whiten(design) if p else np.empty((self.n, 0))
        fit = gls_loglik(self.logdet(), self.whiten(y), wf, design, reml=reml)
        seconds = {"loglik": time.perf_counter() - t0}
        notes = ["loglik, traces, Fisher: Kronecker eigen-decomposition (exact)"]
        use_reml = reml and p > 0
        g_mat = self.solve(design) if (use_reml and (score or fisher)) else np.empty((0, 0))
        grad = traces = info = None
        if score:
            t1 = time.perf_counter()
            resid = y - design @ fit.beta if p else y
            a = self.solve(resid)
            traces = self.trace_terms()
            if use_reml:
                traces = traces - np.array([
                    np.trace(fit.beta_cov @ (g_mat.T @ self.derivative_matvec(i, g_mat)))
                    for i in range(self.kernel.n_params)])
            quad = np.array([a @ self.derivative_matvec(i, a)
                             for i in range(self.kernel.n_params)])
            grad = 0.5 * quad - 0.5 * traces
            seconds["score"] = time.perf_counter() - t1
            notes.append("score: analytic, 1/2 a' Sigma_i a by Kronecker products minus "
                         "1/2 exact traces" + (" of P Sigma_i (REML)" if use_reml else ""))
        if fisher:
            t2 = time.perf_counter()
            info = self.fisher()
            if use_reml:
                info = info - self._reml_fisher_correction(g_mat, fit.beta_cov)
                notes.append("fisher: REML, 1/2 tr(P Sigma_i P Sigma_j)")
            seconds["fisher"] = time.perf_counter() - t2
        return ModelEvaluation(
            source="kronecker", n=self.n, param_names=self.kernel.param_names,
            loglik=fit.loglik, logdet=self.logdet(), quadratic=fit.quadratic, beta=fit.beta,
            score=grad, trace_terms=traces, fisher=info, seconds=seconds, notes=tuple(notes),
        )

    def _reml_fisher_correction(self, g_mat: np.ndarray, cov: np.ndarray) -> np.ndarray:
        """1/2 [2 tr(C G' S_i Sigma^-1 S_j G) - tr(C G' S_i G C G' S_j G)], G = Sigma^-1 F."""
        npar = self.kernel.n_params
        sg = [self.derivative_matvec(i, g_mat) for i in range(npar)]
        ssg = [self.solve(x) for x in sg]
        small = [g_mat.T @ x for x in sg]
        out = np.empty((npar, npar))
        for i in range(npar):
            for j in range(i, npar):
                cross = np.trace(cov @ (sg[i].T @ ssg[j]))
                second = np.trace(cov @ small[i] @ cov @ small[j])
                out[i, j] = out[j, i] = 0.5 * (2.0 * cross - second)
        return out
