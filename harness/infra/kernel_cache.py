"""Load compiled kernels from numba's on-disk cache without calling them.

A child process forked from the fork server (``harness.infra.child_process``) that calls a
compiled kernel (``numba.njit(cache=True)``) loads each signature it needs from numba's
cache at its first call: about 0.6 s for the HODLR solver's kernels and 1 s for
Vecchia's, paid again by every child. ``load_cached_kernels`` loads them once, in the
server, before it forks: for each dispatcher defined in the named modules it takes every
signature that the cache holds for the current source and compiler (numba's cache index)
and asks the dispatcher to compile it, which numba answers from the cache. A forked
child inherits the loaded code and calls it at once.

Kernels compiled with ``parallel=True`` are never loaded here. Loading one from the cache
starts numba's threading layer (``numba.core.typed_passes._reload_parfors``), and a child
forked from a process whose GNU OpenMP layer has started kills itself at its first
parallel loop ("fork() called from a process already using GNU OpenMP, this is unsafe",
SIGTERM; seen on this project's machines with numba 0.68). Those kernels are skipped by
their ``parallel`` option, and any other load that would start the layer (a serial kernel
that calls a parallel one) is refused while loading: numba's ``_launch_threads`` is
replaced for the duration by a function that raises, so that overload is left to the
child. The process that loads therefore never has a threading layer it did not have.

This reads numba's private cache attributes (``Dispatcher._cache``, the cache file's
index); anything unexpected there makes a dispatcher count as ``failed`` and be left to
the child, never an error. Nothing is compiled here: a signature missing from the cache
(a cold cache, a changed source) is not loaded, and the child compiles it as before.

This module is infrastructure: it imports nothing from the rest of ``harness``.
"""

from __future__ import annotations

import importlib
import subprocess
import sys
import time
from collections.abc import Iterator, Sequence
from contextlib import contextmanager
from dataclasses import dataclass
from typing import Any

__all__ = [
    "LoadedKernels",
    "ThreadingLayerRefused",
    "has_cached_signature",
    "load_cached_kernels",
    "start_compile_helper",
]


class ThreadingLayerRefused(RuntimeError):
    """A load tried to start numba's threading layer (module docstring)."""


@dataclass(frozen=True)
class LoadedKernels:
    """What ``load_cached_kernels`` did: overloads loaded, dispatchers skipped for being
    parallel, dispatchers or overloads that could not be loaded, and the seconds taken."""

    loaded: int
    parallel_skipped: tuple[str, ...]
    failed: tuple[str, ...]
    seconds: float


def _dispatchers(module: Any) -> Iterator[tuple[str, Any]]:
    """The numba CPU dispatchers defined in ``module`` (not those it imports)."""
    from numba.core.registry import CPUDispatcher

    for name, value in vars(module).items():
        if isinstance(value, CPUDispatcher) and value.py_func.__module__ == module.__name__:
            yield f"{module.__name__}.{name}", value


def _cached_signatures(dispatcher: Any) -> list[Any]:
    """Signatures the disk cache holds for this source and this compiler."""
    cache = dispatcher._cache
    codegen = dispatcher.targetctx.codegen()
    index = cache._cache_file._load_index()
    return [key[0] for key in index if cache._index_key(key[0], codegen) == key]


def has_cached_signature(dispatcher: Any) -> bool:
    """Whether ``dispatcher`` has a signature in this process or in numba's disk cache for
    the current source and compiler; False where the private cache API is not as expected
    (the caller then treats the kernel as not yet compiled)."""
    try:
        return bool(dispatcher.signatures) or bool(_cached_signatures(dispatcher))
    except Exception:  # noqa: BLE001 - numba's private cache API changed
        return False


def start_compile_helper(module: str, *args: str) -> subprocess.Popen[bytes] | None:
    """``python -m module args...`` started quietly (no input, output discarded) to
    compile kernels into numba's cache while this process works; None when it cannot
    start. Its compiled kernels reach this process through the cache only, so a helper
    that fails or is stopped leaves them to be compiled where they are called."""
    try:
        return subprocess.Popen([sys.executable, "-m", module, *args],
                                stdin=subprocess.DEVNULL, stdout=subprocess.DEVNULL,
                                stderr=subprocess.DEVNULL)
    except OSError:
        return None


@contextmanager
def _threading_layer_refused() -> Iterator[None]:
    """Make numba's ``_launch_threads`` raise while the block runs (module docstring)."""
    from numba.np.ufunc import parallel

    original = parallel._launch_threads

    def refuse() -> None:
        raise ThreadingLayerRefused("loading this kernel would start numba's threading layer")

    parallel._launch_threads = refuse
    try:
        yield
    finally:
        parallel._launch_threads = original


def load_cached_kernels(modules: Sequence[str]) -> LoadedKernels:
    """Load every cached serial kernel of ``modules`` (module docstring); never raises.

    Parameters
    ----------
    modules : sequence of str
        Importable module names; one that fails to import counts as ``failed``.
    """
    start = time.perf_counter()
    loaded = 0
    skipped: list[str] = []
    failed: list[str] = []
    try:
        import numba  # noqa: F401 - a missing numba leaves nothing to load
    except ImportError:
        return LoadedKernels(0, (), tuple(modules), time.perf_counter() - start)
    with _threading_layer_refused():
        for name in modules:
            try:
                module = importlib.import_module(name)
            except Exception:  # noqa: BLE001 - a module that cannot load is the child's
                failed.append(name)
                continue
            for label, dispatcher in _dispatchers(module):
                if dispatcher.targetoptions.get("parallel"):
                    skipped.append(label)
                    continue
                try:
                    signatures = _cached_signatures(dispatcher)
                except Exception:  # noqa: BLE001 - numba's private cache API changed
                    failed.append(label)
                    continue
                for signature in signatures:
                    try:
                        dispatcher.compile(signature)
                    except Exception:  # noqa: BLE001 - left to the child, module docstring
                        failed.append(f"{label}{signature}")
                        continue
                    loaded += 1
    return LoadedKernels(loaded, tuple(skipped), tuple(failed), time.perf_counter() - start)
