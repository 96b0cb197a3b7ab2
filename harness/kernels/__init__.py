"""Covariance kernels: values and log-scale derivatives of any block Sigma[I, J]."""

from harness.kernels.base import (
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
from harness.kernels.dense import assemble_lower
from harness.kernels.registry import KERNEL_CLASSES, KERNELS, UnknownKernelError, make_kernel

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
    "RationalQuadratic",
    "UnknownKernelError",
    "assemble_lower",
    "make_kernel",
    "smoothness",
]
