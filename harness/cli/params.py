"""Parsing ``--param name=value`` (and ``check --fixed-params``) options and building the
kernel they describe."""

from __future__ import annotations

from collections.abc import Sequence

from harness.model.kernels import Kernel, KernelParameterError, make_kernel


class ParamSyntaxError(ValueError):
    """A ``--param`` or ``--fixed-params`` value that is not ``name=value``."""


def parse_params(items: Sequence[str], *, flag: str = "--param"
                 ) -> dict[str, float | list[float]]:
    """Name-value pairs to numbers: ``["variance=1", "lengthscale=0.1,0.3"]`` becomes
    ``{"variance": 1.0, "lengthscale": [0.1, 0.3]}``; messages name ``flag``."""
    params: dict[str, float | list[float]] = {}
    for item in items:
        name, sep, text = item.partition("=")
        name = name.strip()
        if not sep or not name or not text.strip():
            raise ParamSyntaxError(f"{flag} {item!r}: expected name=value, e.g. "
                                   "lengthscale=0.1")
        if name in params:
            raise ParamSyntaxError(f"{flag} {name} given twice")
        try:
            values = [float(v) for v in text.split(",")]
        except ValueError:
            raise ParamSyntaxError(f"{flag} {item!r}: {text!r} is not a number "
                                   "(or comma-separated numbers)") from None
        params[name] = values if len(values) > 1 else values[0]
    return params


def kernel_from_options(name: str, items: Sequence[str], *, dimension: int) -> Kernel:
    """The kernel named ``name`` with ``--param`` values, checked against the data's dimension."""
    params = parse_params(items)
    kernel = make_kernel(name, params)
    try:
        kernel.check_dimension(dimension)
    except KernelParameterError as exc:
        raise KernelParameterError(f"--param {exc}") from None
    return kernel
