"""The first call: the compile notice, ``covaudit warm-up`` and the check's compile-ahead
helper (harness.infra.compile_notice, harness.check.compile_ahead).

Each check runs in a child interpreter with its own ``NUMBA_CACHE_DIR`` (a new folder is
a cleared cache), since numba's listeners and loaded kernels are per process.
"""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import pytest

from harness.infra.compile_notice import NOTICE

#: Compiles two signatures of one cached kernel, a compiled kernel of the project (the
#: dense lower-triangle fill of 40 points), and prints how many outermost compilations
#: ``record_compiles`` saw.
_CALLS = r"""
import sys
import numba
import numpy as np
from harness.infra.compile_notice import first_compile_notice, record_compiles
from harness.model.kernels import Matern32, assemble_lower
sys.path.insert(0, sys.argv[1])
from tiny_kernel import double
with first_compile_notice(), record_compiles() as log:
    double(np.ones(3))
    double(np.ones(3, dtype=np.int64))
    assemble_lower(Matern32(variance=1.0, lengthscale=0.2, nugget=1e-2),
                   np.random.default_rng(0).random((40, 2)))
print(len(log.kernels))
with first_compile_notice():  # outside the first block the listener is gone
    double(np.ones(3, dtype=np.float32))
"""

_TINY_KERNEL = '''
import numba

@numba.njit(cache=True)
def double(x):
    return 2 * x
'''


def _python(code: str, *args: str, cache: Path) -> subprocess.CompletedProcess[str]:
    env = {**os.environ, "NUMBA_CACHE_DIR": str(cache)}
    return subprocess.run([sys.executable, "-c", code, *args], env=env, text=True,
                          capture_output=True, check=False, timeout=300)


@pytest.fixture(scope="module")
def cold_then_warm(tmp_path_factory: pytest.TempPathFactory
                   ) -> tuple[subprocess.CompletedProcess[str], subprocess.CompletedProcess[str]]:
    folder = tmp_path_factory.mktemp("first_call")
    (folder / "tiny_kernel.py").write_text(_TINY_KERNEL)
    cache = folder / "numba-cache"
    cold = _python(_CALLS, str(folder), cache=cache)
    warm = _python(_CALLS, str(folder), cache=cache)
    return cold, warm


def test_notice_once_on_a_cold_cache(cold_then_warm) -> None:
    cold, _ = cold_then_warm
    assert cold.returncode == 0, cold.stderr
    # the notice precedes the first compilation of a block and is not repeated within it
    # (module docstring): one for the first block's three or more compilations, one for
    # the second block's one
    assert cold.stderr.splitlines().count(NOTICE) == 2, cold.stderr
    # two signatures of ``double`` plus at least the fill kernel: three or more
    assert int(cold.stdout.split()[-1]) >= 3


def test_no_notice_on_a_warm_cache(cold_then_warm) -> None:
    _, warm = cold_then_warm
    assert warm.returncode == 0, warm.stderr
    assert NOTICE not in warm.stderr
    # everything loaded from the cache: no compilation at all
    assert warm.stdout.split()[-1] == "0"


def test_a_closed_stream_never_fails_the_compilation() -> None:
    # The stream a caller passed (or the standard error a test swapped in) may be closed
    # by the time a kernel compiles: the notice is dropped and the kernel still runs.
    import io

    import numba
    import numpy as np

    from harness.infra.compile_notice import first_compile_notice

    closed = io.StringIO()
    closed.close()

    @numba.njit
    def triple(x):
        return 3 * x

    with first_compile_notice(closed):
        assert triple(np.ones(2)).tolist() == [3.0, 3.0]


def test_the_notice_reads_standard_error_when_it_writes(monkeypatch) -> None:
    import io

    import numba

    from harness.infra.compile_notice import first_compile_notice

    @numba.njit
    def quadruple(x):
        return 4 * x

    with first_compile_notice():
        swapped = io.StringIO()
        monkeypatch.setattr(sys, "stderr", swapped)
        assert quadruple(2) == 8
    assert swapped.getvalue().splitlines() == [NOTICE]


def test_warm_up_is_listed_in_help() -> None:
    from harness.cli import build_parser

    text = build_parser().format_help()
    assert "warm-up" in text


def _cli(*argv: str, cache: Path) -> subprocess.CompletedProcess[str]:
    env = {**os.environ, "NUMBA_CACHE_DIR": str(cache)}
    return subprocess.run([sys.executable, "-m", "harness", *argv], env=env, text=True,
                          capture_output=True, check=False, timeout=1800)


@pytest.mark.slow
def test_warm_up_twice_on_a_cleared_cache(tmp_path: Path) -> None:
    """Minutes: the first run compiles every kernel of the project."""
    first = _cli("warm-up", cache=tmp_path)
    assert first.returncode == 0, first.stderr
    assert first.stderr.splitlines().count(NOTICE) == 1
    assert "warm-up: compiled" in first.stdout
    second = _cli("warm-up", cache=tmp_path)
    assert second.returncode == 0, second.stderr
    assert NOTICE not in second.stderr
    assert "warm-up: everything was already compiled" in second.stdout
    assert "compiled " not in second.stdout.replace("already compiled", "")


_AHEAD = r"""
from harness.check.compile_ahead import PART_KERNELS, missing_parts, start_compile_ahead
parts = tuple(PART_KERNELS)
print(",".join(missing_parts(parts)))
ahead = start_compile_ahead("matern32", parts)
print(ahead.process.wait(timeout=600))
print(",".join(missing_parts(parts)))
print(start_compile_ahead("matern32", parts) is None)
"""


def test_the_helper_compiles_what_the_cache_lacks_and_nothing_when_warm(tmp_path) -> None:
    # harness.check.compile_ahead: on a cleared cache every part is missing; the helper
    # process compiles each into numba's cache, after which none is missing and no
    # helper starts
    done = _python(_AHEAD, cache=tmp_path / "numba-cache")
    assert done.returncode == 0, done.stderr
    before, code, after, none_started = done.stdout.split("\n")[:4]
    assert before == "dense,products"
    assert code == "0" and after == "" and none_started == "True"


def test_the_helper_parts_follow_the_reference() -> None:
    from harness.check.compile_ahead import parts_for

    assert parts_for("dense", compiled_family=True) == ("dense", "products")
    assert parts_for("operator", compiled_family=True) == ("products",)
    assert parts_for("ladder", compiled_family=True) == ()
    assert parts_for("statespace", compiled_family=True) == ()
    assert parts_for("dense", compiled_family=False) == ()


def test_finishing_stops_a_helper_still_running() -> None:
    # The check has ended: nothing waits for the helper, which is stopped at once
    import time

    from harness.check.compile_ahead import CompileAhead

    sleeper = subprocess.Popen([sys.executable, "-c", "import time; time.sleep(60)"])
    start = time.perf_counter()
    CompileAhead(process=sleeper, parts=("dense",)).finish()
    assert sleeper.returncode is not None and time.perf_counter() - start < 10
