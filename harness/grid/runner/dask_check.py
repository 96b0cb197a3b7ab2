"""Dask as the environment provides it: installed or not, a scheduler reachable or not.

``run`` and ``evaluate`` take ``--dask-local N`` and ``--scheduler ADDR``. Without the
``dask`` extra, or with a scheduler that does not answer, they stop before any work with
one line naming the option, the install command or the address and the timeout, raised
as ``DaskUnavailableError`` (a ``ValueError``, which both verbs report as bad input, exit
2). Nothing already computed is touched, so the same command resumes once the cause is
fixed.
"""

from __future__ import annotations

from types import ModuleType
from typing import Any

#: Seconds ``--scheduler ADDR`` waits for the scheduler to answer.
SCHEDULER_TIMEOUT_S = 30.0
#: The install command of the extra that brings Dask.
INSTALL_COMMAND = 'pip install "covaudit[dask]"'


class DaskUnavailableError(ValueError):
    """Dask is not installed, or the scheduler named cannot be reached."""


def import_distributed(*, option: str) -> ModuleType:
    """``distributed``, or a one-line ``DaskUnavailableError`` naming the install extra.

    Parameters
    ----------
    option : str
        The command-line option that needs Dask (``--dask-local`` or ``--scheduler``).

    Returns
    -------
    module
        The ``distributed`` package.

    Raises
    ------
    DaskUnavailableError
        When ``dask`` or ``distributed`` cannot be imported.
    """
    try:
        import dask  # noqa: F401 - distributed needs it; its absence is the common case
        import distributed
    except ImportError as exc:
        missing = exc.name or "dask.distributed"
        raise DaskUnavailableError(
            f"{option} needs Dask, which is not installed here (no module {missing!r}); "
            f"install it with {INSTALL_COMMAND}, then run the same command again") from None
    return distributed


def connect_scheduler(address: str, *, timeout: float | None = None) -> Any:
    """A ``distributed.Client`` joined to the scheduler at ``address``.

    Parameters
    ----------
    address : str
        The scheduler's address, e.g. ``tcp://host:8786``.
    timeout : float, optional
        Seconds to wait for the scheduler (default ``SCHEDULER_TIMEOUT_S``).

    Returns
    -------
    distributed.Client

    Raises
    ------
    DaskUnavailableError
        When Dask is missing, the address is malformed, or no scheduler answers in time;
        the message gives the address and the timeout.
    """
    seconds = SCHEDULER_TIMEOUT_S if timeout is None else float(timeout)
    distributed = import_distributed(option="--scheduler")
    try:
        return distributed.Client(address, timeout=f"{seconds:g}s")
    except ValueError as exc:
        raise DaskUnavailableError(
            f"--scheduler {address!r}: not a scheduler address ({exc}); give one like "
            "tcp://host:8786") from None
    except (OSError, TimeoutError) as exc:
        raise DaskUnavailableError(
            f"--scheduler {address}: no Dask scheduler answered within {seconds:g} s "
            f"({type(exc).__name__}); check the address and that the scheduler is running, "
            "then run the same command again") from None


def check_dask_options(*, dask_local: int | None, scheduler: str | None,
                       timeout: float | None = None) -> None:
    """Before any work: Dask importable for ``--dask-local``, the scheduler answering for
    ``--scheduler``; nothing to check when neither is given.

    Parameters
    ----------
    dask_local : int or None
        ``--dask-local N``.
    scheduler : str or None
        ``--scheduler ADDR``.
    timeout : float, optional
        Seconds to wait for the scheduler (default ``SCHEDULER_TIMEOUT_S``).

    Raises
    ------
    DaskUnavailableError
        As ``import_distributed`` and ``connect_scheduler``.
    """
    if scheduler is not None:
        connect_scheduler(scheduler, timeout=timeout).close()
    elif dask_local is not None:
        import_distributed(option="--dask-local")
