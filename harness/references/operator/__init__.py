"""Exact-operator reference: the Gaussian likelihood beyond the dense memory limit.

Every number comes from exact kernel entries, computed tile by tile and never stored
(memory O(n k), time O(n^2 k) per product of an n x k block). A factorization of the
same covariance (the solver under test, or the built-in one at a tight tolerance) may
*precondition* the iterations; its errors change only iteration counts and reported
standard errors, never the expected answer.

Modules, one concern each:

- ``schedule``: tiles, the round-robin order of tile pairs, the memory guard;
- ``products``: compiled tiled products Sigma B and dSigma/dtheta_i B (``KernelOperator``);
- ``product_progress``: the tqdm bar of long products;
- ``distributed``: row blocks of the products on Dask workers;
- ``pcg``: preconditioned CG with its rigorous quadratic-form bound;
- ``operator_gls``: the GLS mean and quadratic form by CG;
- ``lanczos``: stochastic Lanczos quadrature of log det;
- ``score_traces``: tr(Sigma^-1 Sigma_i) as the preconditioner's trace plus a correction;
- ``reference``: ``operator_evaluate`` -> ``OperatorEvaluation``;
- ``operator_kriging``: kriging mean and variance by CG;
- ``product_cost``: the time of an evaluation from a measured product rate;
- ``iteration_counts``: the preconditioned CG and Lanczos counts on a window of the data.

Usage::

    from harness.solvers.registry import resolve_solver
    from harness.references.operator import operator_evaluate

    pre = resolve_solver("hodlr").factorize(points, kernel, tol=1e-10, rng=0)
    ev = operator_evaluate(points, y, kernel, preconditioner=pre, rng=1)
    ev.loglik, ev.loglik_se, ev.quadratic_bound, ev.converged, ev.messages

On a cluster: start a Dask scheduler and workers (``dask scheduler`` on one host,
``dask worker tcp://HOST:8786 --nthreads 1`` or more on each machine, every one with
this package installed in the same version), then pass a client::

    from dask.distributed import Client
    ev = operator_evaluate(points, y, kernel, preconditioner=pre,
                           client=Client("tcp://HOST:8786"))

or on the command line ``covaudit evaluate ... --solver operator --scheduler
tcp://HOST:8786`` (``--dask-local N`` starts N local worker processes instead). Only
the products go to the workers (row blocks, ``distributed``); the CG and Lanczos
recurrences and the preconditioner stay in the calling process. Each worker's numba
threads follow ``NUMBA_NUM_THREADS`` on that worker.
"""

from harness.references.operator.operator_kriging import OperatorKriging, operator_kriging
from harness.references.operator.pcg import PreconditionerError
from harness.references.operator.product_cost import (
    ProductCost,
    estimate_operator_seconds,
    measure_product_cost,
    operator_evaluation_seconds,
    predicted_column_products,
)
from harness.references.operator.products import KernelOperator
from harness.references.operator.reference import (
    BOUND_ESTIMATE,
    BOUND_NUGGET,
    OperatorEvaluation,
    operator_evaluate,
)
from harness.references.operator.schedule import ProductMemoryError

__all__ = [
    "BOUND_ESTIMATE",
    "BOUND_NUGGET",
    "KernelOperator",
    "OperatorEvaluation",
    "OperatorKriging",
    "PreconditionerError",
    "ProductMemoryError",
    "ProductCost",
    "estimate_operator_seconds",
    "operator_evaluate",
    "operator_kriging",
    "measure_product_cost",
    "operator_evaluation_seconds",
    "predicted_column_products",
]
