"""A lock file that gives one ``covaudit run`` at a time a run directory.

``DIR/.covaudit.lock`` holds the owner's process id, host and start time. On POSIX the
lock is an exclusive ``fcntl.flock`` on that file, which the kernel releases when the
owner exits or is killed, so a lock left by a killed run is stale by construction and is
taken over (the takeover is logged with the dead owner's process id). Where ``flock`` is
unavailable, the recorded process id is checked for life instead (``psutil``).
"""

from __future__ import annotations

import contextlib
import errno
import json
import logging
import os
import socket
import time
from pathlib import Path
from typing import Any

from harness.grid.store.run_directory import OutputDirectoryError

logger = logging.getLogger(__name__)

LOCK_FILE = ".covaudit.lock"

try:
    import fcntl
except ImportError:  # pragma: no cover - Windows
    fcntl = None  # type: ignore[assignment]


class RunDirectoryLocked(OutputDirectoryError):
    """Another live process holds the run directory."""


def _describe(owner: dict[str, Any]) -> str:
    pid = owner.get("pid", "?")
    host = owner.get("host", "?")
    started = owner.get("started", "?")
    return f"process {pid} on {host} (started {started})"


def _read(path: Path) -> dict[str, Any]:
    try:
        data = json.loads(path.read_text(encoding="utf-8") or "{}")
    except (OSError, json.JSONDecodeError, UnicodeDecodeError):
        return {}
    return data if isinstance(data, dict) else {}


def _alive(pid: int) -> bool:
    import psutil

    try:
        return psutil.Process(pid).status() != psutil.STATUS_ZOMBIE
    except (psutil.NoSuchProcess, psutil.AccessDenied):
        return False


class RunLock:
    """Hold ``DIR/.covaudit.lock`` while a run writes into ``DIR`` (module docstring)."""

    def __init__(self, directory: str | Path) -> None:
        self.path = Path(directory) / LOCK_FILE
        self._fd: int | None = None
        self.took_over: dict[str, Any] | None = None

    def acquire(self) -> RunLock:
        """Take the lock; raises ``RunDirectoryLocked`` naming the live owner."""
        previous = _read(self.path) if self.path.exists() else {}
        fd = os.open(self.path, os.O_RDWR | os.O_CREAT, 0o644)
        if fcntl is not None:
            try:
                fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
            except OSError:
                os.close(fd)
                owner: dict[str, Any] = {}
                for _ in range(40):  # the owner may be between flock and writing its pid
                    owner = _read(self.path)
                    if owner.get("pid"):
                        break
                    time.sleep(0.05)
                raise RunDirectoryLocked(
                    errno.EBUSY, f"run directory {str(self.path.parent)!r} is in use by "
                                 f"{_describe(owner)}; wait for that run to finish, stop it, "
                                 "or choose another --out") from None
        elif previous.get("pid") and previous.get("host") == socket.gethostname() \
                and _alive(int(previous["pid"])) and int(previous["pid"]) != os.getpid():
            os.close(fd)
            raise RunDirectoryLocked(
                errno.EBUSY, f"run directory {str(self.path.parent)!r} is in use by "
                             f"{_describe(previous)}; wait for it, or choose another --out")
        if previous.get("pid"):
            self.took_over = previous
            logger.warning("%s: took over the stale lock of %s, which is no longer running",
                           self.path.parent, _describe(previous))
        body = {"pid": os.getpid(), "host": socket.gethostname(),
                "started": time.strftime("%Y-%m-%dT%H:%M:%S%z")}
        os.ftruncate(fd, 0)
        os.pwrite(fd, (json.dumps(body) + "\n").encode(), 0)
        self._fd = fd
        return self

    def release(self) -> None:
        """Empty the lock file and drop the lock (an empty file is no owner)."""
        if self._fd is None:
            return
        with contextlib.suppress(OSError):
            os.ftruncate(self._fd, 0)
        os.close(self._fd)  # closing releases the flock
        self._fd = None

    def __enter__(self) -> RunLock:
        return self.acquire()

    def __exit__(self, *exc: object) -> None:
        self.release()
