"""Kernel families by command-line name, and construction from named parameters."""

from __future__ import annotations

import difflib
from collections.abc import Mapping, Sequence

from harness.model.kernels.classes import (
    Exponential,
    Gaussian,
    Kernel,
    Matern,
    Matern32,
    Matern52,
    RationalQuadratic,
)
from harness.model.kernels.parameters import KernelParameterError

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
        close = difflib.get_close_matches(str(name), list(KERNELS), n=1)
        hint = f" (did you mean {close[0]!r}?)" if close else ""
        raise UnknownKernelError(f"unknown kernel {name!r}{hint}; known kernels: "
                                 f"{known}") from None


def make_kernel(name: str, params: Mapping[str, float | Sequence[float]]) -> Kernel:
    """Build a kernel from its family name and natural-scale parameters.

    The parameters a family takes, which are required and their domains come from its
    ``PARAMETERS`` declarations (``harness.model.kernels.parameters``): ``variance``
    (default 1), ``lengthscale`` (required), ``nugget`` (default 0) and the family's shape
    parameter (``nu`` for ``matern``, ``alpha`` for ``rational_quadratic``). Unknown names
    are refused with the valid ones.
    """
    cls = kernel_class(name)
    allowed = [spec.name for spec in cls.PARAMETERS]
    unknown = sorted(set(params) - set(allowed))
    if unknown:
        raise KernelParameterError(
            f"kernel {name!r} does not take parameter(s) {', '.join(unknown)}; "
            f"it takes {', '.join(sorted(allowed))}"
        )
    kwargs: dict[str, object] = {}
    for spec in cls.PARAMETERS:
        if spec.name not in params:
            if spec.required:
                example = " (e.g. nu=1.5)" if spec.name == "nu" else ""
                raise KernelParameterError(
                    f"kernel {name!r}: parameter {spec.name!r} is required{example}")
            continue
        value = params[spec.name]
        if spec.per_coordinate:
            kwargs[spec.name] = value
        elif isinstance(value, int | float) and not isinstance(value, bool):
            kwargs[spec.name] = float(value)
        else:
            raise KernelParameterError(f"{spec.name}: expected one number, got {value!r}")
    return cls(**kwargs)  # type: ignore[arg-type]
