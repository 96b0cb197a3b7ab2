"""``check --dask-local`` / ``--scheduler`` (issue 22, item 9): the exact operator's
products on a real Dask cluster (a LocalCluster) give the serial values, and a missing
Dask or an unreachable scheduler is one line with exit code 2 before any work."""

from __future__ import annotations

import json
import socket
import sys

import pytest

from harness.infra.exit_codes import ExitCode
from tests.test_statespace_kriging import FIXED, _plane_file, _run


def _check(path, out, *extra):
    return _run([str(path), "--coords", "e,n", "--value", "z", "--tolerances", "1e-6,1e-8",
                 *FIXED, "--reference", "operator", "--solver-seeds", "1", "--json",
                 "--holdout-points", "12", "--variance-points", "5", "--no-refit",
                 "--out", str(out), *extra])


def test_operator_products_on_a_local_cluster_match_serial(tmp_path, capsys):
    # Source: the serial run of the same check; the tiles are summed in a fixed order,
    # so the values agree to 1e-12 relative (the criterion).
    pytest.importorskip("distributed")
    path = _plane_file(tmp_path)
    assert _check(path, tmp_path / "serial") in (ExitCode.OK, ExitCode.FINDING)
    serial = json.loads(capsys.readouterr().out)
    assert _check(path, tmp_path / "dask", "--dask-local", "2") in (ExitCode.OK,
                                                                    ExitCode.FINDING)
    dask = json.loads(capsys.readouterr().out)
    assert dask["reference"] == serial["reference"] == "operator"
    scale = max(1.0, abs(serial["loglik"]))
    for a, b in zip(dask["tolerances"], serial["tolerances"], strict=True):
        assert a["status"] == b["status"]
        for name in ("loglik_error", "param_shift_se", "kriging_mean_sd"):
            assert abs(a[name]["value"] - b[name]["value"]) <= 1e-12 * scale, name


def test_check_without_dask_names_the_extra(tmp_path, monkeypatch, capsys):
    path = _plane_file(tmp_path, n=60)
    monkeypatch.setitem(sys.modules, "distributed", None)  # as if the extra were missing
    assert _check(path, tmp_path / "o", "--dask-local", "2") == ExitCode.ERROR
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "--dask-local" in err[0] and "covaudit[dask]" in err[0]
    assert not (tmp_path / "o").exists()


def test_check_with_an_unreachable_scheduler_fails_before_any_work(tmp_path, monkeypatch,
                                                                  capsys):
    pytest.importorskip("distributed")
    from harness.grid.runner import dask_check

    path = _plane_file(tmp_path, n=60)
    with socket.socket() as probe:  # a port nothing listens on
        probe.bind(("127.0.0.1", 0))
        address = f"tcp://127.0.0.1:{probe.getsockname()[1]}"
    monkeypatch.setattr(dask_check, "SCHEDULER_TIMEOUT_S", 2.0)
    assert _check(path, tmp_path / "o", "--scheduler", address) == ExitCode.ERROR
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and f"--scheduler {address}" in err[0] and "within 2 s" in err[0]
    assert not (tmp_path / "o").exists()
