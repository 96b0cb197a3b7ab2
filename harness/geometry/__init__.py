"""Point sets (and, with the compressed solver, cluster trees)."""

from harness.geometry.pointsets import (
    GENERATORS,
    clustered,
    generate,
    jittered_grid,
    sorted_1d,
    stretched,
    tensor_grid,
    uniform,
)

__all__ = [
    "GENERATORS",
    "clustered",
    "generate",
    "jittered_grid",
    "sorted_1d",
    "stretched",
    "tensor_grid",
    "uniform",
]
