"""Run one function in a child process, so that a native crash or a hang in it is reported.

``call_in_child(fn, *args, timeout=..., what=..., **kwargs)`` runs ``fn`` in a fresh
child process and returns its result or re-raises its exception here. When the child
dies (os.abort, a segmentation fault inside a native library, os._exit, the out-of-memory
killer) it raises ``ChildCrashed`` with the signal or exit status and the last lines the
child wrote to standard error (faulthandler's report included); past ``timeout`` seconds
the child is killed and ``ChildTimeout`` is raised (counted from the moment the child has
started, so start-up is not charged to the call). ``fn`` and its arguments must be
picklable (a module-level function), and so must its result: only results cross the
boundary.

How a child starts. Never by a plain ``fork`` of the caller: numba's and OpenMP's thread
pools are not safe across ``fork``. Where the platform has it, children are forked from
multiprocessing's ``forkserver``, a clean single-threaded process started on the first
call, which imports numpy, scipy, numba and the module of the first ``fn`` once; a child
then starts in milliseconds instead of re-importing everything (about 3 s, which made
process isolation most of the cost of a small check). The server is one per process
(multiprocessing keeps it), and so is the record of the environment it was started
with. Variables that libraries read only when they load (thread counts such as
``OPENBLAS_NUM_THREADS``, numba's ``NUMBA_*`` settings) cannot change in a forked child,
so when one of them differs from the server's, that child is started by ``spawn`` instead;
every other variable is the caller's at the moment of the call, as with ``spawn``. A
command that will start many children starts the server itself first
(``prepare_server``), naming more modules to preload, among them one whose import loads
compiled kernels from numba's cache (``harness.infra.kernel_cache``), so that no child
loads them again.

Children die with their parent: on Linux each asks the kernel for SIGKILL when its parent
(the caller, or the server, which exits with the caller: ``enter_child``) dies
(``prctl(PR_SET_PDEATHSIG)``, prctl(2)), and everywhere a watchdog thread exits the child
when its parent process changes (an orphan is re-parented). Children ignore SIGINT, so
Ctrl-C reaches only the caller, which stops them.

Test hook: a child whose ``stage`` equals the environment variable
``COVAUDIT_TEST_CRASH_STAGE`` kills itself with SIGSEGV before calling ``fn``, so tests
can inject a native crash into a real stage of a real command.

This module is infrastructure: it imports nothing from the rest of ``harness``.
"""

from __future__ import annotations

import contextlib
import ctypes
import multiprocessing
import os
import signal
import sys
import tempfile
import threading
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from multiprocessing.connection import Connection, wait
from pathlib import Path
from typing import Any

#: Lines of a dead child's standard error kept in its failure record.
STDERR_TAIL_LINES = 12
#: Seconds between the watchdog's checks that the parent is alive.
WATCHDOG_SECONDS = 1.0
_PR_SET_PDEATHSIG = 1
#: A child's first message: imports done, a call's timeout may start counting.
READY = "ready"
#: Environment variable naming the stage whose child crashes on purpose (tests only).
CRASH_STAGE_VARIABLE = "COVAUDIT_TEST_CRASH_STAGE"


def die_with_parent(parent: int) -> None:
    """Ask for SIGKILL when the parent dies (Linux) and start the orphan watchdog."""
    if sys.platform.startswith("linux"):
        with contextlib.suppress(OSError, AttributeError):
            libc = ctypes.CDLL(None, use_errno=True)
            libc.prctl(_PR_SET_PDEATHSIG, int(signal.SIGKILL), 0, 0, 0)
    if os.getppid() != parent:  # the parent died before prctl took effect
        os._exit(1)

    def watch() -> None:
        while True:
            time.sleep(WATCHDOG_SECONDS)
            if os.getppid() != parent:
                os._exit(1)

    threading.Thread(target=watch, name="covaudit-parent-watchdog", daemon=True).start()


def enter_child(parent: int | None, environment: dict[str, str]) -> None:
    """First steps of a child: die with its parent (the server, ``parent`` None, when it
    was forked from the server) and take the caller's environment, as ``spawn`` would.

    A child forked from the server inherits the write end of the pipe whose end-of-file
    tells the server that the process that started it has died (CPython's
    ``multiprocessing.forkserver`` hands it to every child). Held open by the child, it
    would keep the server alive after a ``kill -9`` of that process, and the server would
    keep the child alive (it dies with the server): the child closes it. A child that
    needs a fork server of its own then starts one.
    """
    if parent is None:
        from multiprocessing import forkserver

        server = forkserver._forkserver
        alive = getattr(server, "_forkserver_alive_fd", None)
        if alive is not None:
            with contextlib.suppress(OSError):
                os.close(alive)
            server._forkserver_alive_fd = None  # type: ignore[attr-defined]
    die_with_parent(os.getppid() if parent is None else parent)
    if os.environ != environment:
        os.environ.clear()
        os.environ.update(environment)


#: Lines of faulthandler's report that say nothing about the task (module lists and the
#: frames of the worker machinery itself).
_NOISE = ("Extension modules:", "multiprocessing/", "harness/grid/runner/", "harness/infra/",
          "<string>\", line")


def stderr_tail(text: str, *, lines: int = STDERR_TAIL_LINES) -> list[str]:
    """The last ``lines`` informative lines of a dead worker's standard error."""
    kept = [line.rstrip() for line in text.splitlines()
            if line.strip() and not any(noise in line for noise in _NOISE)]
    return kept[-lines:]


def signal_description(exitcode: int | None) -> str:
    """``killed by signal 6 (SIGABRT)`` for a negative exit code, else the exit status."""
    if exitcode is None:
        return "still running"
    if exitcode < 0:
        try:
            name = signal.Signals(-exitcode).name
        except ValueError:
            name = "unknown signal"
        return f"killed by signal {-exitcode} ({name})"
    return f"exited with status {exitcode}"


class ChildCrashed(RuntimeError):
    """The child process died before returning (``signal``, ``exitcode``, ``stderr_tail``)."""

    def __init__(self, message: str, *, exitcode: int | None, stderr_tail: list[str]) -> None:
        super().__init__(message)
        self.exitcode = exitcode
        self.signal = -exitcode if exitcode is not None and exitcode < 0 else None
        self.stderr_tail = stderr_tail

    @property
    def cause(self) -> str:
        """How the child ended, in a few words: ``crashed with signal 11 (SIGSEGV)``, or
        ``exited with status 0 without returning a result`` (``os._exit``, ``sys.exit``
        in a thread, the out-of-memory killer's relatives)."""
        if self.signal is not None:
            return "crashed with " + signal_description(self.exitcode).removeprefix("killed by ")
        return f"{signal_description(self.exitcode)} without returning a result"


class ChildTimeout(TimeoutError):
    """The child ran past its timeout (``timeout`` seconds) and was stopped."""

    def __init__(self, message: str, *, timeout: float | None) -> None:
        super().__init__(message)
        self.timeout = timeout


#: Prefixes and suffixes of environment variables read when a library loads (module
#: docstring): a child forked from the server keeps the server's values of these.
_LOAD_TIME_PREFIXES = ("NUMBA_", "OMP_", "OPENBLAS_", "GOTO", "MKL_", "BLIS_", "VECLIB_",
                       "KMP_", "PYTHON", "LD_")
_LOAD_TIME_SUFFIX = "_NUM_THREADS"
#: Modules the server imports before its first fork (besides the first ``fn``'s module).
_PRELOAD = ("numpy", "scipy.linalg", "numba")


def _load_time_environment() -> dict[str, str]:
    return {key: value for key, value in os.environ.items()
            if key.startswith(_LOAD_TIME_PREFIXES) or key.endswith(_LOAD_TIME_SUFFIX)}


@dataclass
class _ForkServer:
    """This process's record of multiprocessing's fork server: the load-time environment
    it was started with (None before its first use)."""

    environment: dict[str, str] | None = None


#: One per process, like the server it records (module docstring).
_SERVER = _ForkServer()


def start_context(module: str) -> tuple[Any, bool]:
    """The multiprocessing context a child starts from, and whether it is forked from the
    server (module docstring); ``module`` joins the server's preloaded modules when this
    call starts the server. A child forked from it calls ``enter_child`` first."""
    if "forkserver" not in multiprocessing.get_all_start_methods():
        return multiprocessing.get_context("spawn"), False
    environment = _load_time_environment()
    if _SERVER.environment is None:
        server = multiprocessing.get_context("forkserver")
        server.set_forkserver_preload([*_PRELOAD, module])
        _SERVER.environment = environment
        return server, True
    if environment == _SERVER.environment:
        return multiprocessing.get_context("forkserver"), True
    return multiprocessing.get_context("spawn"), False


def prepare_server(modules: Sequence[str]) -> bool:
    """Start the fork server now, with ``modules`` preloaded beside numpy, scipy and numba.

    A command that will start many children (``check``) calls this first, naming the
    modules its children need, among them a warm-up module whose import loads compiled
    kernels from numba's cache (``harness.solvers.compiled_preload``): the server does
    the imports and the loading once, while the caller goes on (the server is a separate
    process and this call does not wait for it), and every child forked later inherits
    them. Returns False, doing nothing, where the server has already started in this
    process (its preload cannot change; children then import and load what they need
    themselves) or the platform has no fork server.
    """
    if "forkserver" not in multiprocessing.get_all_start_methods() \
            or _SERVER.environment is not None:
        return False
    from multiprocessing import forkserver

    multiprocessing.get_context("forkserver").set_forkserver_preload([*_PRELOAD, *modules])
    _SERVER.environment = _load_time_environment()
    forkserver.ensure_running()
    return True


def _child(conn: Connection, stderr_path: str, parent: int | None, stage: str | None,
           environment: dict[str, str], fn: Callable[..., Any], args: tuple[Any, ...],
           kwargs: dict[str, Any]) -> None:
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    enter_child(parent, environment)
    fd = os.open(stderr_path, os.O_WRONLY | os.O_CREAT | os.O_APPEND, 0o600)
    os.dup2(fd, 2)
    os.close(fd)
    import faulthandler

    faulthandler.enable(file=sys.stderr)
    conn.send(READY)
    if stage is not None and os.environ.get(CRASH_STAGE_VARIABLE) == stage:
        sys.stderr.write(f"{CRASH_STAGE_VARIABLE}={stage}: crashing on purpose\n")
        sys.stderr.flush()
        os.kill(os.getpid(), signal.SIGSEGV)
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
                  what: str = "the call", stage: str | None = None,
                  timeout_option: str = "--task-timeout", daemon: bool = True,
                  **kwargs: Any) -> Any:
    """``fn(*args, **kwargs)`` in a child process (module docstring).

    ``what`` names the work in error messages (``"the solver plugin 'pkg.mod:f'"``);
    ``stage`` names it for the crash-injection hook of the tests; ``timeout_option`` is
    the option a timeout message points to. ``daemon=False`` lets the child start
    processes of its own (a local Dask cluster); it still dies with its parent.
    """
    context, forked = start_context(getattr(fn, "__module__", None) or "numpy")
    with tempfile.TemporaryDirectory(prefix="covaudit-child-") as folder:
        stderr_path = Path(folder) / "stderr"
        stderr_path.touch()
        parent_conn, child_conn = context.Pipe(duplex=False)
        process = context.Process(target=_child, daemon=daemon,
                                  args=(child_conn, str(stderr_path),
                                        None if forked else os.getpid(), stage,
                                        dict(os.environ), fn, args, kwargs))
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
                                       f"({timeout_option} allows longer)", timeout=timeout)
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
                   "(a native crash: os.abort, a segmentation fault, os._exit or the "
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


class StageCrashed(RuntimeError):
    """A stage of the harness's own computation crashed or hung in its child process.

    The message is one line: the stage, n, how the child died and what to try.
    """

    def __init__(self, message: str, *, stage: str, n: int, cause: str) -> None:
        super().__init__(message)
        self.stage, self.n, self.cause = stage, n, cause


def run_stage(fn: Callable[..., Any], *args: Any, stage: str, n: int, advice: str,
              timeout: float | None = None, **kwargs: Any) -> Any:
    """``fn(*args, **kwargs)`` in a child process; a crash or hang becomes ``StageCrashed``.

    Parameters
    ----------
    stage : str
        What the call computes, as the user reads it (``"the dense reference"``); also
        the name the crash-injection hook matches (module docstring).
    n : int
        The problem size, quoted in the message.
    advice : str
        What to try, quoted after "try" (``"OPENBLAS_NUM_THREADS=1, ..."``).
    """
    try:
        return call_in_child(fn, *args, timeout=timeout, what=stage, stage=stage, **kwargs)
    except ChildCrashed as exc:
        cause = signal_description(exc.exitcode)
    except ChildTimeout:
        cause = f"ran longer than {timeout:g} s and was stopped"
    raise StageCrashed(f"{stage} at n = {n:,} {cause} in its child process (nothing of it "
                       f"was kept); try {advice}", stage=stage, n=n, cause=cause)
