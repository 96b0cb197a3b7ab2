"""Say so when this process compiles a numba kernel, and count what it compiled.

The kernels are ``numba.njit(cache=True)`` functions, compiled per argument signature on
their first call and stored in numba's cache (``__pycache__`` beside the module, or
``NUMBA_CACHE_DIR``). A later process loads them from there in milliseconds; a fresh
install, a cleared cache or a new numba version pays the compilation once, which for the
HODLR factorization alone takes tens of seconds.

How a compilation is recognised: numba's dispatcher first looks up a signature among the
overloads already in the process, then in the on-disk cache, and only when both miss does
it compile, inside a ``"numba:compile"`` event (``numba.core.event``). A listener on that
event therefore fires exactly for the compilations a call really does, on the call path it
really takes, and never on a warm cache: no list of kernels to probe, no timing heuristic.
Kernels compiled inside another kernel's compilation (callees, numba's own overloads) fire
nested events; only the outermost ones are counted.

- ``first_compile_notice(stream)`` is a context manager: inside it, a listener writes
  ``NOTICE`` on ``stream`` when the first compilation starts and is silent after that.
  The CLI wraps a verb that computes in it. The listener is removed when the block ends,
  and it looks up standard error when it writes, not when it is installed, so a caller
  that swaps standard error (a test capturing output) never leaves it writing to a closed
  stream. A failed write is dropped: the notice is a courtesy, and it must never turn a
  computation into a failure. Processes started with ``spawn`` (the child-process guard,
  the run's workers) do not inherit it: their standard error is a log, not the terminal.
- ``record_compiles()`` is a context manager yielding a ``CompileLog``: the kernels
  compiled inside the block, with the seconds each took (``covaudit warm-up`` prints it).

This module is infrastructure: it imports nothing from the rest of ``harness``.
"""

from __future__ import annotations

import sys
import time
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass, field
from typing import Any, TextIO

from numba.core import event

#: The line written before the first compilation of a process.
NOTICE = "covaudit: compiling kernels (once)"
_COMPILE_EVENT = "numba:compile"


def _kernel_name(data: Any) -> str:
    """``module.function`` of the dispatcher an event is about."""
    function = data["dispatcher"].py_func
    return f"{function.__module__}.{function.__qualname__}"


class _FirstCompileNotice(event.Listener):
    """Writes ``NOTICE`` on the first compile event it sees, and nothing after; ``stream``
    None means whatever ``sys.stderr`` is at that moment."""

    def __init__(self, stream: TextIO | None) -> None:
        self.stream = stream
        self.shown = False

    def on_start(self, ev: event.Event) -> None:
        if self.shown:
            return
        self.shown = True
        try:
            print(NOTICE, file=self.stream or sys.stderr, flush=True)
        except (OSError, ValueError):
            pass  # a closed or full stream: the notice is dropped, the compilation goes on

    def on_end(self, ev: event.Event) -> None:
        pass


@contextmanager
def first_compile_notice(stream: TextIO | None = None) -> Iterator[None]:
    """Write ``NOTICE`` on ``stream`` (default: standard error at the moment of writing)
    before the first kernel compiled inside the ``with`` block; nothing on a warm cache.
    """
    with event.install_listener(_COMPILE_EVENT, _FirstCompileNotice(stream)):
        yield


@dataclass(frozen=True)
class CompiledKernel:
    """One compilation: the kernel (``module.function``), its argument types and the
    wall seconds it took, nested compilations included."""

    name: str
    signature: str
    seconds: float


@dataclass
class CompileLog:
    """The outermost compilations seen while ``record_compiles`` was active, in order."""

    kernels: list[CompiledKernel] = field(default_factory=list)

    @property
    def seconds(self) -> float:
        return sum(k.seconds for k in self.kernels)


class _CompileRecorder(event.Listener):
    """Appends each outermost compilation to a ``CompileLog``."""

    def __init__(self, log: CompileLog) -> None:
        self.log = log
        self.started: list[float] = []

    def on_start(self, ev: event.Event) -> None:
        self.started.append(time.perf_counter())

    def on_end(self, ev: event.Event) -> None:
        began = self.started.pop()
        if not self.started:
            self.log.kernels.append(CompiledKernel(
                name=_kernel_name(ev.data), signature=", ".join(map(str, ev.data["args"])),
                seconds=time.perf_counter() - began))


@contextmanager
def record_compiles() -> Iterator[CompileLog]:
    """Record the kernels compiled inside the ``with`` block (none on a warm cache)."""
    log = CompileLog()
    with event.install_listener(_COMPILE_EVENT, _CompileRecorder(log)):
        yield log
