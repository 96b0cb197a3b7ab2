"""The state folder of ``check``: finished stages kept on disk, so a rerun resumes.

A check on 10^5 points runs for an hour; an interruption (Ctrl-C, ``kill -9``, a batch
job's time limit) must not lose what was finished. ``check --out reports/x`` keeps, in
``reports/.x.check-state/`` (``state_folder``):

- ``inputs.json``: one hash per input that changes a result (the data file's contents,
  how it is read, every ``CheckOptions`` field except ``RESULT_FREE_OPTIONS``, the
  covaudit version) and the key, the hash of them all;
- ``fit.pickle``: the fit (the parameters and the Fisher information at them);
- ``unit-<knob value>-<index>-<seed>.pickle``: each finished (knob value, solver seed)
  audit, the ``SeedAudit`` that the engine (or the solver's child process) returned.

Each file is written to a temporary file in the same folder, flushed, fsynced and renamed
over its name (``os.replace``), so an interruption leaves it whole or absent and loses at
most the unit in flight. A rerun whose key matches reuses every file (also after a
finished check: the folder stays); a rerun whose key differs reuses nothing, names the
inputs that changed and starts the folder afresh at its first save.

The files are Python pickles of the harness's own records: the folder is trusted like the
output folder it sits in, and every file carries the key it was written under.

A test kills the process after its N-th save with the environment variable
``COVAUDIT_TEST_KILL_AFTER_SAVES`` = N (``KILL_AFTER_SAVES_VARIABLE``; ``N:SIGINT`` sends
that signal instead of SIGKILL, as Ctrl-C would).
"""

from __future__ import annotations

import dataclasses
import hashlib
import json
import os
import pickle
import signal
import tempfile
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from harness._version import __version__
from harness.audit.engine import SeedAudit

#: The state folder of output folder ``reports/x`` is ``reports/.x.check-state``.
STATE_SUFFIX = ".check-state"
INPUTS_FILE = "inputs.json"
FIT_FILE = "fit.pickle"
KILL_AFTER_SAVES_VARIABLE = "COVAUDIT_TEST_KILL_AFTER_SAVES"
#: ``CheckOptions`` fields that change no saved result: the limit of a solver call (a
#: call that times out is not saved) and whether the refit follows (it is not saved).
RESULT_FREE_OPTIONS = frozenset({"solver_timeout", "refit", "timing_repeats", "dask_local",
                                 "scheduler"})
#: The name of the data file's input in ``inputs.json`` and in messages.
DATA_FILE_INPUT = "the data file"
_FORMAT = 1


def file_digest(path: str | Path) -> str:
    """SHA-256 of a file's bytes, read in blocks of 1 MiB."""
    digest = hashlib.sha256()
    with open(path, "rb") as stream:
        for block in iter(lambda: stream.read(1 << 20), b""):
            digest.update(block)
    return digest.hexdigest()


def _plain(value: Any) -> Any:
    if dataclasses.is_dataclass(value) and not isinstance(value, type):
        return dataclasses.asdict(value)
    if isinstance(value, Mapping):
        return dict(value)
    return repr(value)


def value_digest(value: Any) -> str:
    """SHA-256 of a value's canonical JSON text (sorted keys; exact float reprs)."""
    text = json.dumps(value, sort_keys=True, default=_plain)
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


def state_inputs(datafile: str | Path, reading: Mapping[str, Any], options: Any
                 ) -> dict[str, str]:
    """One hash per input that changes a check's result.

    Parameters
    ----------
    datafile : path
        The data file: its contents count, not its name or its time stamps.
    reading : mapping
        How the file is read (columns, coordinate system, missing rows, duplicates), by
        option name.
    options : CheckOptions
        Every field counts except ``RESULT_FREE_OPTIONS``
        (``harness.check.check_options.CheckOptions``).
    """
    inputs = {DATA_FILE_INPUT: file_digest(datafile),
              "the covaudit version": value_digest(__version__)}
    inputs |= {f"option {name}": value_digest(value) for name, value in reading.items()}
    inputs |= {f"option {field.name}": value_digest(getattr(options, field.name))
               for field in dataclasses.fields(options)
               if field.name not in RESULT_FREE_OPTIONS}
    return inputs


def state_folder(out: str | Path) -> Path:
    """The state folder of a check writing into ``out``: a hidden folder beside it
    (``STATE_SUFFIX``), so the output folder only ever holds finished outputs."""
    out = Path(out)
    return out.parent / f".{out.name}{STATE_SUFFIX}"


def state_key(inputs: Mapping[str, str]) -> str:
    """The hash of every input's hash: equal keys, equal results."""
    return value_digest({"format": _FORMAT, "inputs": dict(inputs)})


def changed_inputs(saved: Mapping[str, str], now: Mapping[str, str]) -> list[str]:
    """The inputs whose hash differs (or that only one side has), in ``now``'s order."""
    names = list(now) + [name for name in saved if name not in now]
    return [name for name in names if saved.get(name) != now.get(name)]


def _write_atomically(path: Path, data: bytes) -> None:
    """Write ``data`` to a temporary file beside ``path``, fsync it, rename it over."""
    handle, temporary = tempfile.mkstemp(prefix=f".{path.name}-", suffix=".tmp",
                                         dir=path.parent)
    try:
        with os.fdopen(handle, "wb") as stream:
            stream.write(data)
            stream.flush()
            os.fsync(stream.fileno())
        os.replace(temporary, path)
    except BaseException:
        Path(temporary).unlink(missing_ok=True)
        raise
    directory = os.open(path.parent, os.O_RDONLY)
    try:
        os.fsync(directory)
    finally:
        os.close(directory)


class CheckState:
    """The saved stages of one check (module docstring); a ``SavedAudits`` for the engine.

    Open it with ``CheckState.open``, which says whether the folder's saved stages apply.
    """

    def __init__(self, folder: Path, key: str, inputs: Mapping[str, str]) -> None:
        self.folder = folder
        self.key = key
        self.inputs = dict(inputs)
        self.recorded = False
        self.saves = 0

    @classmethod
    def open(cls, folder: str | Path, inputs: Mapping[str, str]
             ) -> tuple[CheckState, str | None]:
        """The state in ``folder`` for these ``inputs``, and a line for the user.

        Nothing is written here: the folder and its record are written with the first
        saved stage, so a check that fails before (bad options, the solver's trial) leaves
        nothing behind. Files saved under another key are never loaded (each carries its
        key) and are deleted at the first save; the line then names the inputs that
        changed. It is None when the folder holds no record or the same key.
        """
        folder = Path(folder)
        state = cls(folder, state_key(inputs), inputs)
        try:
            record = json.loads((folder / INPUTS_FILE).read_text(encoding="utf-8"))
            saved_key, saved_inputs = record["key"], dict(record["inputs"])
        except FileNotFoundError:
            return state, None
        except (OSError, ValueError, KeyError, TypeError):
            return state, f"reusing nothing from {folder}: its {INPUTS_FILE} is unreadable"
        if saved_key == state.key:
            state.recorded = True
            return state, None
        changed = ", ".join(changed_inputs(saved_inputs, inputs))
        return state, f"reusing nothing from {folder}: {changed} changed"

    def _record(self) -> None:
        """Start the folder afresh under this key: delete files of another key, write the
        record of the inputs."""
        self.folder.mkdir(parents=True, exist_ok=True)
        for old in self.folder.glob("*.pickle"):
            old.unlink(missing_ok=True)
        text = json.dumps({"format": _FORMAT, "key": self.key, "inputs": self.inputs},
                          indent=1, sort_keys=True)
        _write_atomically(self.folder / INPUTS_FILE, text.encode("utf-8"))
        self.recorded = True

    def _load(self, name: str) -> Any:
        if not self.recorded:
            return None
        path = self.folder / name
        try:
            key, payload = pickle.loads(path.read_bytes())
        except (OSError, pickle.UnpicklingError, EOFError, ValueError, TypeError,
                AttributeError, ImportError):
            return None
        return payload if key == self.key else None

    def _save(self, name: str, payload: Any) -> None:
        if not self.recorded:
            self._record()
        _write_atomically(self.folder / name, pickle.dumps((self.key, payload)))
        self.saves += 1
        count, _, name = os.environ.get(KILL_AFTER_SAVES_VARIABLE, "").partition(":")
        if count == str(self.saves):
            os.kill(os.getpid(), signal.Signals[name or "SIGKILL"])

    def load_fit(self) -> Any:
        """The saved fit, or None."""
        return self._load(FIT_FILE)

    def save_fit(self, fit: Any) -> None:
        """Keep the fit."""
        self._save(FIT_FILE, fit)

    @staticmethod
    def _unit_name(value: float, index: int, seed: int, solver: int = 0) -> str:
        # the first listed solver keeps the names of a one-solver check
        prefix = "unit" if solver == 0 else f"unit-s{solver}"
        return f"{prefix}-{float(value)!r}-{index}-{seed}.pickle"

    def load(self, value: float, index: int, seed: int, *, solver: int = 0
             ) -> SeedAudit | None:
        """The saved audit of ``seed`` (the ``index``-th) at knob ``value`` of the
        ``solver``-th listed solver, or None."""
        audit = self._load(self._unit_name(value, index, seed, solver))
        return audit if isinstance(audit, SeedAudit) else None

    def save(self, value: float, index: int, seed: int, audit: SeedAudit, *,
             solver: int = 0) -> None:
        """Keep a finished audit."""
        self._save(self._unit_name(value, index, seed, solver), audit)

    def for_solver(self, solver: int) -> SolverUnits:
        """The saved audits of the ``solver``-th listed solver (a ``SavedAudits``)."""
        return SolverUnits(self, solver)

    def saved_units(self, values: Sequence[float], seeds: Sequence[int], *,
                    solver: int = 0) -> tuple[int, int]:
        """How many knob values have every seed's audit saved, and how many audits are
        saved in all, among ``values`` x ``seeds`` of the ``solver``-th listed solver."""
        found = [[self.load(value, index, seed, solver=solver) is not None
                  for index, seed in enumerate(seeds)] for value in values]
        return sum(all(row) for row in found), sum(sum(row) for row in found)


@dataclass(frozen=True)
class SolverUnits:
    """One listed solver's view of a ``CheckState`` (a ``SavedAudits`` for the engine)."""

    state: CheckState
    solver: int

    def load(self, value: float, index: int, seed: int) -> SeedAudit | None:
        return self.state.load(value, index, seed, solver=self.solver)

    def save(self, value: float, index: int, seed: int, audit: SeedAudit) -> None:
        self.state.save(value, index, seed, audit, solver=self.solver)
