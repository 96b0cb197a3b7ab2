"""Kernel families by command-line name, and construction from named parameters."""

from __future__ import annotations

from collections.abc import Mapping, Sequence

from harness.model.kernels.classes import (
    Exponential,
    Gaussian,
    Kernel,
    KernelParameterError,
    Matern,
    Matern32,
    Matern52,
    RationalQuadratic,
)

#: Every family, in the order listed to users. Adding a kernel means adding its class
#: here; the kernel test-suite iterates over this tuple.
KERNEL_CLASSES: tuple[type[Kernel], ...] = (
    Exponential, Matern32, Matern52, Matern, Gaussian, RationalQuadratic,
)
KERNELS: dict[str, type[Kernel]] = {cls.family: cls for cls in KERNEL_CLASSES}


class UnknownKernelError(KernelParameterError):
    """A kernel name that is not one of ``KERNELS``."""


def kernel_class(name: str) -> type[Kernel]:
    try:
        return KERNELS[name]
    except KeyError:
        known = ", ".join(KERNELS)
        raise UnknownKernelError(f"unknown kernel {name!r}; known kernels: {known}") from None


def make_kernel(name: str, params: Mapping[str, float | Sequence[float]]) -> Kernel:
    """Build a kernel from its family name and natural-scale parameters.

    ``params`` holds ``variance`` (default 1), ``lengthscale`` (required), ``nugget``
    (default 0) and the family's shape parameter (``nu`` for ``matern``, ``alpha`` for
    ``rational_quadratic``). Unknown parameter names are refused with the valid ones.
    """
    cls = kernel_class(name)
    allowed = {"variance", "lengthscale", "nugget"}
    if cls is Matern:
        allowed.add("nu")
    if cls is RationalQuadratic:
        allowed.add("alpha")
    unknown = sorted(set(params) - allowed)
    if unknown:
        raise KernelParameterError(
            f"kernel {name!r} does not take parameter(s) {', '.join(unknown)}; "
            f"it takes {', '.join(sorted(allowed))}"
        )
    if "lengthscale" not in params:
        raise KernelParameterError(f"kernel {name!r}: parameter 'lengthscale' is required")
    if cls is Matern and "nu" not in params:
        raise KernelParameterError("kernel 'matern': parameter 'nu' is required (e.g. nu=1.5)")
    kwargs = dict(params)
    for key in ("variance", "nugget", "nu", "alpha"):
        if key in kwargs:
            value = kwargs[key]
            if not isinstance(value, int | float):
                raise KernelParameterError(f"{key}: expected one number, got {value!r}")
            kwargs[key] = float(value)
    return cls(**kwargs)  # type: ignore[arg-type]
