"""Stationary covariance kernels with log-scale parameters and block evaluation.

The model covariance is

    Sigma(theta) = s2 * R(X; l, shape) + tau2 * I,

with correlation R from a radial family (``harness.model.kernels.radial``), variance s2,
length scale(s) l (one shared, or one per coordinate) and nugget tau2. The parameter
vector is on the log scale, theta = (log s2, log l_1 .. log l_k, log tau2); the nugget
is a parameter only when it is positive (a zero nugget is a fixed, exact
interpolation model). Shape parameters (Matern nu, rational-quadratic alpha) are fixed
and not part of theta.

Derivatives are those of Sigma with respect to theta (Rasmussen and Williams 2006,
eq. 5.9 needs dSigma/dtheta_i):

    dSigma/dlog s2  = s2 R
    dSigma/dlog l_k = s2 * s(r) * w_k        (see ``radial``; w_k = 1 when isotropic)
    dSigma/dlog tau2 = tau2 I

Blocks Sigma[I, J] are evaluated from the index sets alone; the nugget is added where
a row index equals a column index (the same observation), never merely where two
coordinates coincide.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field, replace
from typing import ClassVar

import numpy as np

from harness.model.kernels import radial
from harness.model.kernels.assembly import FAMILY_FUNCTIONS, fill_correlation, fill_with_derivatives
from harness.model.kernels.parameters import (
    LENGTHSCALE,
    NUGGET,
    VARIANCE,
    KernelParameterError,
    ParameterSpec,
)

_NUMPY_CHUNK = 1 << 20  # entries per temporary in the numpy path (8 MiB of float64)


def _as_lengthscale(value: float | Sequence[float]) -> tuple[float, ...]:
    try:
        values = np.atleast_1d(np.asarray(value, dtype=np.float64)).ravel()
    except (TypeError, ValueError):
        raise KernelParameterError(
            f"lengthscale: expected one number or one per coordinate, got {value!r}") from None
    if values.size == 0:
        raise KernelParameterError(
            "lengthscale: expected one value or one per coordinate, got none")
    return tuple(float(v) for v in values)


@dataclass(frozen=True)
class Kernel:
    """Base class of the stationary kernels: variance, length scale(s) and nugget.

    Parameters
    ----------
    variance : float
        Marginal variance s2 > 0 of the correlated part.
    lengthscale : float or sequence of float
        One length scale (isotropic) or one per coordinate (anisotropic), all > 0.
    nugget : float
        Independent noise variance tau2 >= 0 added on the diagonal.

    Subclasses set ``family`` (the name used on the command line) and implement
    ``radial`` (rho and its slope); those with a compiled closed form set
    ``compiled = True`` and ``shape_value``. ``PARAMETERS`` declares every parameter
    once (``harness.model.kernels.parameters``); a subclass with a shape parameter adds
    its ``ParameterSpec`` and a keyword-only field of the same name.
    """

    variance: float = 1.0
    lengthscale: tuple[float, ...] = (1.0,)
    nugget: float = 0.0

    family: ClassVar[str] = ""
    compiled: ClassVar[bool] = False
    closed_form: ClassVar[str] = ""
    PARAMETERS: ClassVar[tuple[ParameterSpec, ...]] = (VARIANCE, LENGTHSCALE, NUGGET)

    def __init_subclass__(cls, *, family: str = "", compiled: bool = False,
                          closed_form: str = "", **kwargs: object) -> None:
        """``class Name(Kernel, family=..., compiled=..., closed_form=...)``."""
        super().__init_subclass__(**kwargs)
        if family:
            cls.family, cls.compiled, cls.closed_form = family, compiled, closed_form

    def __post_init__(self) -> None:
        lengthscale = _as_lengthscale(self.lengthscale)
        several = len(lengthscale) > 1
        object.__setattr__(self, "lengthscale", tuple(
            LENGTHSCALE.check(v, label=f"lengthscale[{k}]" if several else None)
            for k, v in enumerate(lengthscale, start=1)))
        for spec in self.PARAMETERS:
            if spec is not LENGTHSCALE:
                object.__setattr__(self, spec.name, spec.check(getattr(self, spec.name)))
        self._check_shape()

    @classmethod
    def parameter(cls, name: str) -> ParameterSpec:
        """The declaration of parameter ``name`` (``KernelParameterError`` if unknown)."""
        for spec in cls.PARAMETERS:
            if spec.name == name:
                return spec
        known = ", ".join(spec.name for spec in cls.PARAMETERS)
        raise KernelParameterError(
            f"kernel {cls.family!r} has no parameter {name!r}; it takes {known}")

    # -- description ---------------------------------------------------------------
    def _check_shape(self) -> None:
        """Checks of shape parameters beyond their declared domain (subclasses override)."""

    @property
    def shape_value(self) -> float:
        """The fixed shape parameter handed to the compiled loop (0 when none)."""
        return 0.0

    @property
    def shape_params(self) -> dict[str, float]:
        """Fixed shape parameters by name (``nu``, ``alpha``), empty when none."""
        return {}

    @property
    def isotropic(self) -> bool:
        return len(self.lengthscale) == 1

    @property
    def has_nugget(self) -> bool:
        return self.nugget > 0.0

    @property
    def param_names(self) -> tuple[str, ...]:
        """Names of theta's entries: ``log_variance``, ``log_lengthscale[_k]``, ``log_nugget``."""
        names = ["log_variance"]
        if self.isotropic:
            names.append("log_lengthscale")
        else:
            names += [f"log_lengthscale_{k}" for k in range(1, len(self.lengthscale) + 1)]
        if self.has_nugget:
            names.append("log_nugget")
        return tuple(names)

    @property
    def n_params(self) -> int:
        return len(self.param_names)

    @property
    def theta(self) -> np.ndarray:
        """Log-scale parameter vector in the order of ``param_names``."""
        values = [self.variance, *self.lengthscale]
        if self.has_nugget:
            values.append(self.nugget)
        return np.log(np.asarray(values, dtype=float))

    def with_theta(self, theta: Sequence[float] | np.ndarray) -> Kernel:
        """A copy with parameters exp(theta) (same family, shape and nugget status)."""
        theta = np.asarray(theta, dtype=float)
        if theta.shape != (self.n_params,):
            raise KernelParameterError(
                f"theta: expected {self.n_params} values {self.param_names}, "
                f"got shape {theta.shape}"
            )
        values = np.exp(theta)
        k = len(self.lengthscale)
        nugget = float(values[1 + k]) if self.has_nugget else 0.0
        return replace(self, variance=float(values[0]),
                       lengthscale=tuple(float(v) for v in values[1:1 + k]), nugget=nugget)

    def natural_params(self) -> dict[str, float | list[float]]:
        """Parameters on their natural scale, for reports and JSON."""
        out: dict[str, float | list[float]] = {"variance": self.variance}
        out["lengthscale"] = self.lengthscale[0] if self.isotropic else list(self.lengthscale)
        out["nugget"] = self.nugget
        out.update(self.shape_params)
        return out

    def check_dimension(self, d: int) -> None:
        if not self.isotropic and len(self.lengthscale) != d:
            raise KernelParameterError(
                f"lengthscale: {len(self.lengthscale)} values given for {d}-dimensional points; "
                f"give one value or {d}"
            )

    # -- correlation ---------------------------------------------------------------
    def radial(self, r: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """rho(r) and s(r) = -r rho'(r) for scaled distances r.

        Families without shape parameters name their closed form in ``radial``
        (``closed_form``); those with one (nu, alpha) override this method.
        """
        if not self.closed_form:
            raise NotImplementedError(f"{type(self).__name__} declares no closed form")
        form = getattr(radial, self.closed_form)
        return form(r)

    def scale_points(self, points: np.ndarray) -> np.ndarray:
        """Coordinates divided by the length scale(s), C-contiguous float64."""
        points = np.asarray(points, dtype=float)
        if points.ndim == 1:
            points = points[:, None]
        self.check_dimension(points.shape[1])
        return np.ascontiguousarray(points / np.asarray(self.lengthscale))

    def _numpy_block(self, xs: np.ndarray, ys: np.ndarray, with_derivatives: bool
                     ) -> tuple[np.ndarray, np.ndarray | None]:
        m, n = xs.shape[0], ys.shape[0]
        out = np.empty((m, n))
        derivs = np.empty((len(self.lengthscale), m, n)) if with_derivatives else None
        step = max(1, _NUMPY_CHUNK // max(n, 1))
        for i0 in range(0, m, step):
            i1 = min(m, i0 + step)
            diff2 = (xs[i0:i1, None, :] - ys[None, :, :]) ** 2
            q = diff2.sum(axis=2)
            r = np.sqrt(q)
            rho, s = self.radial(r)
            out[i0:i1] = self.variance * rho
            if derivs is not None:
                if self.isotropic:
                    derivs[0, i0:i1] = self.variance * s
                else:
                    with np.errstate(invalid="ignore", divide="ignore"):
                        w = np.where(q[..., None] > 0, diff2 / q[..., None], 0.0)
                    derivs[:, i0:i1] = np.moveaxis(self.variance * s[..., None] * w, 2, 0)
        return out, derivs

    def cross_covariance(self, points_a: np.ndarray, points_b: np.ndarray) -> np.ndarray:
        """s2 * R(points_a, points_b), without nugget (distinct observations)."""
        xs, ys = self.scale_points(points_a), self.scale_points(points_b)
        if self.compiled:
            out = np.empty((xs.shape[0], ys.shape[0]))
            fill_correlation(FAMILY_FUNCTIONS[self.family][0], xs, ys, self.shape_value,
                             self.variance, out)
            return out
        return self._numpy_block(xs, ys, with_derivatives=False)[0]

    def _add_nugget(self, out: np.ndarray, rows: np.ndarray, cols: np.ndarray,
                    value: float) -> None:
        if value == 0.0:
            return
        _, ia, ib = np.intersect1d(rows, cols, assume_unique=False, return_indices=True)
        out[ia, ib] += value

    def block(self, points: np.ndarray, rows: np.ndarray, cols: np.ndarray) -> np.ndarray:
        """Sigma[rows, cols] of the observations at ``points`` (index arrays, no repeats)."""
        rows = np.asarray(rows, dtype=np.intp)
        cols = np.asarray(cols, dtype=np.intp)
        points = np.asarray(points, dtype=float)
        out = self.cross_covariance(points[rows], points[cols])
        self._add_nugget(out, rows, cols, self.nugget)
        return out

    def block_with_derivatives(self, points: np.ndarray, rows: np.ndarray, cols: np.ndarray
                               ) -> tuple[np.ndarray, np.ndarray]:
        """Sigma[rows, cols] and dSigma/dtheta_i[rows, cols] stacked as (p, m, n)."""
        rows = np.asarray(rows, dtype=np.intp)
        cols = np.asarray(cols, dtype=np.intp)
        points = np.asarray(points, dtype=float)
        xs, ys = self.scale_points(points[rows]), self.scale_points(points[cols])
        m, n, k = xs.shape[0], ys.shape[0], len(self.lengthscale)
        derivs = np.empty((self.n_params, m, n))
        if self.compiled:
            value = np.empty((m, n))
            fill_with_derivatives(FAMILY_FUNCTIONS[self.family][1], xs, ys, self.shape_value,
                                  self.variance, self.isotropic, value, derivs[1:1 + k])
        else:
            value, ls_derivs = self._numpy_block(xs, ys, with_derivatives=True)
            derivs[1:1 + k] = ls_derivs
        derivs[0] = value
        if self.has_nugget:
            derivs[1 + k] = 0.0
            self._add_nugget(derivs[1 + k], rows, cols, self.nugget)
            self._add_nugget(value, rows, cols, self.nugget)
        return value, derivs

    def derivative_block(self, points: np.ndarray, rows: np.ndarray, cols: np.ndarray,
                         i: int) -> np.ndarray:
        """dSigma/dtheta_i[rows, cols] for one parameter index i."""
        if not 0 <= i < self.n_params:
            raise IndexError(f"parameter index {i} out of range for {self.param_names}")
        return self.block_with_derivatives(points, rows, cols)[1][i]

    def covariance(self, points: np.ndarray) -> np.ndarray:
        """The whole Sigma of the observations at ``points`` (small n only)."""
        idx = np.arange(np.asarray(points).shape[0])
        return self.block(points, idx, idx)

    def describe(self) -> str:
        shape = "".join(f", {k}={v:g}" for k, v in self.shape_params.items())
        ls = (f"{self.lengthscale[0]:g}" if self.isotropic
              else "(" + ", ".join(f"{v:g}" for v in self.lengthscale) + ")")
        return (f"{self.family}(variance={self.variance:g}, lengthscale={ls}, "
                f"nugget={self.nugget:g}{shape})")


@dataclass(frozen=True)
class Exponential(Kernel, family="exponential", compiled=True, closed_form="exponential"):
    """Exponential kernel, Matern nu = 1/2: rho = exp(-r)."""


@dataclass(frozen=True)
class Matern32(Kernel, family="matern32", compiled=True, closed_form="matern32"):
    """Matern nu = 3/2: rho = (1 + sqrt(3) r) exp(-sqrt(3) r)."""


@dataclass(frozen=True)
class Matern52(Kernel, family="matern52", compiled=True, closed_form="matern52"):
    """Matern nu = 5/2: rho = (1 + sqrt(5) r + 5 r^2 / 3) exp(-sqrt(5) r)."""


@dataclass(frozen=True)
class Gaussian(Kernel, family="gaussian", compiled=True, closed_form="gaussian"):
    """Squared exponential: rho = exp(-r^2 / 2)."""


@dataclass(frozen=True)
class RationalQuadratic(Kernel, family="rational_quadratic", compiled=True):
    """Rational quadratic with fixed alpha: rho = (1 + r^2 / (2 alpha))^-alpha."""

    alpha: float = field(default=1.0, kw_only=True)

    PARAMETERS: ClassVar[tuple[ParameterSpec, ...]] = (*Kernel.PARAMETERS, ParameterSpec(
        "alpha", "rational-quadratic shape alpha (large alpha: the Gaussian kernel)", 0.0,
        shape=True))

    @property
    def shape_value(self) -> float:
        return float(self.alpha)

    @property
    def shape_params(self) -> dict[str, float]:
        return {"alpha": float(self.alpha)}

    def radial(self, r: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        return radial.rational_quadratic(r, self.alpha)


@dataclass(frozen=True)
class Matern(Kernel):
    """General Matern with fixed smoothness 0 < nu <= ``radial.MATERN_NU_MAX`` (1e8),
    evaluated in log space through scipy.special.kve and a large-order Bessel expansion
    (``radial.matern_general``), so large nu tends to the Gaussian kernel instead of
    underflowing; larger nu is refused (use the gaussian kernel, its limit)."""

    nu: float = field(default=1.5, kw_only=True)

    family: ClassVar[str] = "matern"
    PARAMETERS: ClassVar[tuple[ParameterSpec, ...]] = (*Kernel.PARAMETERS, ParameterSpec(
        "nu", "Matern smoothness nu (1/2: exponential; large nu: the Gaussian kernel)", 0.0,
        radial.MATERN_NU_MAX, shape=True, required=True))

    @property
    def shape_value(self) -> float:
        return float(self.nu)

    @property
    def shape_params(self) -> dict[str, float]:
        return {"nu": float(self.nu)}

    def radial(self, r: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        return radial.matern_general(r, self.nu)


def smoothness(kernel: Kernel) -> float | None:
    """Matern smoothness nu of a kernel (None for non-Matern families)."""
    return {"exponential": 0.5, "matern32": 1.5, "matern52": 2.5}.get(
        kernel.family, kernel.shape_params.get("nu") if kernel.family == "matern" else None)
