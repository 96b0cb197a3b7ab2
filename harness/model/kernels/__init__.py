"""Covariance kernels: values and log-scale derivatives of any block Sigma[I, J]."""

from harness.model.kernels.classes import (
    Exponential,
    Gaussian,
    Kernel,
    KernelParameterError,
    Matern,
    Matern32,
    Matern52,
    RationalQuadratic,
    smoothness,
)
from harness.model.kernels.kernel_names import (
    KERNEL_CLASSES,
    KERNELS,
    UnknownKernelError,
    make_kernel,
)
from harness.model.kernels.lower_fill import assemble_lower
from harness.model.kernels.parameters import ParameterSpec

__all__ = [
    "KERNELS",
    "KERNEL_CLASSES",
    "Exponential",
    "Gaussian",
    "Kernel",
    "KernelParameterError",
    "Matern",
    "Matern32",
    "Matern52",
    "ParameterSpec",
    "RationalQuadratic",
    "UnknownKernelError",
    "assemble_lower",
    "make_kernel",
    "smoothness",
]
