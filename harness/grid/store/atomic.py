"""Atomic file writes: a temporary file in the same directory, fsync, then ``os.replace``.

``os.replace`` is atomic on POSIX and Windows when source and target are on the same
file system, so a reader (or a rerun after the writer was killed) sees either the old
file or the complete new one, never a partial write. Leftover temporary files (a writer
killed between create and replace) start with ``TEMP_PREFIX`` and are ignored by loaders.
"""

from __future__ import annotations

import json
import os
import tempfile
from pathlib import Path
from typing import Any

TEMP_PREFIX = ".tmp-"


def _file_mode() -> int:
    """The mode ``open()`` would give a new file here (0o666 less the umask); ``mkstemp``
    creates 0o600, which would make results unreadable to a group that should see them."""
    mask = os.umask(0)
    os.umask(mask)
    return 0o666 & ~mask


def atomic_write_text(path: str | Path, text: str) -> Path:
    """Write ``text`` to ``path`` atomically (see module docstring)."""
    path = Path(path)
    fd, temp = tempfile.mkstemp(prefix=TEMP_PREFIX, suffix=path.suffix, dir=path.parent)
    try:
        if hasattr(os, "fchmod"):
            os.fchmod(fd, _file_mode())
        with os.fdopen(fd, "w", encoding="utf-8") as handle:
            handle.write(text)
            handle.flush()
            os.fsync(handle.fileno())
        os.replace(temp, path)
    except BaseException:
        try:
            os.unlink(temp)
        except FileNotFoundError:
            pass
        raise
    return path


def atomic_write_json(path: str | Path, value: Any) -> Path:
    """JSON (indented, NaN refused: missing values must be written as null) atomically."""
    return atomic_write_text(path, json.dumps(value, indent=1, sort_keys=True,
                                              allow_nan=False) + "\n")
