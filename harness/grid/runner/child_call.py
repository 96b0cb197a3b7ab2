"""Call one function in a child process, so that a crash or a hang in it is reported.

``call_in_child(fn, *args, timeout=..., **kwargs)`` runs ``fn`` in a fresh ``spawn``
process (the same isolation as the grid's workers, ``harness.grid.runner.workers``: the
child dies with its parent and ignores SIGINT) and returns its result or re-raises its
exception here. When the child dies (os.abort, a segfault, os._exit) it raises
``ChildCrashed`` with the signal or exit status and the last lines the child wrote to
standard error; past ``timeout`` seconds the child is killed and ``ChildTimeout`` is
raised (counted from the moment the child has started, so start-up is not charged to
the call). ``fn`` and its arguments must be picklable (a module-level function).
"""

from __future__ import annotations

import contextlib
import multiprocessing
import os
import signal
import sys
import tempfile
import time
from collections.abc import Callable
from multiprocessing.connection import Connection, wait
from pathlib import Path
from typing import Any

from harness.grid.runner.workers import READY, die_with_parent, signal_description, stderr_tail


class ChildCrashed(RuntimeError):
    """The child process died before returning (``signal``, ``exitcode``, ``stderr_tail``)."""

    def __init__(self, message: str, *, exitcode: int | None, stderr_tail: list[str]) -> None:
        super().__init__(message)
        self.exitcode = exitcode
        self.signal = -exitcode if exitcode is not None and exitcode < 0 else None
        self.stderr_tail = stderr_tail


class ChildTimeout(TimeoutError):
    """The child ran past its timeout and was stopped."""


def _child(conn: Connection, stderr_path: str, parent: int, fn: Callable[..., Any],
           args: tuple[Any, ...], kwargs: dict[str, Any]) -> None:
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    die_with_parent(parent)
    fd = os.open(stderr_path, os.O_WRONLY | os.O_CREAT | os.O_APPEND, 0o600)
    os.dup2(fd, 2)
    os.close(fd)
    import faulthandler

    faulthandler.enable(file=sys.stderr)
    conn.send(READY)
    try:
        result: tuple[bool, Any] = (True, fn(*args, **kwargs))
    except BaseException as exc:  # noqa: BLE001 - every exception goes back to the parent
        result = (False, exc)
    sys.stderr.flush()
    try:
        conn.send(result)
    except Exception as exc:  # noqa: BLE001 - an unpicklable result or exception
        conn.send((False, RuntimeError(f"{type(result[1]).__name__}: {result[1]} "
                                       f"(could not be sent back: {exc})")))


def call_in_child(fn: Callable[..., Any], *args: Any, timeout: float | None = None,
                  what: str = "the call", **kwargs: Any) -> Any:
    """``fn(*args, **kwargs)`` in a child process (module docstring).

    ``what`` names the work in error messages (``"the solver plugin 'pkg.mod:f'"``).
    """
    context = multiprocessing.get_context("spawn")
    with tempfile.TemporaryDirectory(prefix="covaudit-child-") as folder:
        stderr_path = Path(folder) / "stderr"
        stderr_path.touch()
        parent_conn, child_conn = context.Pipe(duplex=False)
        process = context.Process(target=_child, daemon=True,
                                  args=(child_conn, str(stderr_path), os.getpid(), fn, args,
                                        kwargs))
        process.start()
        child_conn.close()
        deadline = None  # counts from the child's READY (start-up is not the call's time)
        try:
            while True:
                left = None if deadline is None else max(0.0, deadline - time.monotonic())
                ready = wait([parent_conn, process.sentinel], timeout=left)
                if parent_conn in ready:
                    try:
                        message = parent_conn.recv()
                    except (EOFError, OSError):
                        break
                    if message == READY:
                        deadline = None if timeout is None else time.monotonic() + timeout
                        continue
                    ok, value = message
                    process.join(timeout=10)
                    _pass_on(stderr_path)
                    if ok:
                        return value
                    raise value
                if process.sentinel in ready:
                    break
                if deadline is not None and time.monotonic() >= deadline:
                    process.kill()
                    process.join(timeout=5)
                    _pass_on(stderr_path)
                    raise ChildTimeout(f"{what} ran longer than {timeout:g} s and was stopped "
                                       "(--task-timeout allows longer)")
        finally:
            with contextlib.suppress(OSError):
                parent_conn.close()
            if process.is_alive():
                process.kill()
                process.join(timeout=5)
        process.join(timeout=5)
        text = _pass_on(stderr_path, echo=False)
        lines = stderr_tail(text)
        message = (f"{what} {signal_description(process.exitcode)} in its child process "
                   "(a crash inside the solver: os.abort, a segfault, os._exit or the "
                   "out-of-memory killer)")
        if lines:
            message += "; last standard-error lines:\n" + "\n".join(f"  | {x}" for x in lines)
        raise ChildCrashed(message, exitcode=process.exitcode, stderr_tail=lines)


def _pass_on(path: Path, *, echo: bool = True) -> str:
    try:
        text = path.read_text(encoding="utf-8", errors="replace")
    except OSError:
        return ""
    if text and echo:
        sys.stderr.write(text)
        sys.stderr.flush()
    return text
