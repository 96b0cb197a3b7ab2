"""Fetch classic spatial datasets from Debian's R packages at test time, without R.

``apt-get download r-cran-fields r-cran-sp`` fetches the .deb files, ``dpkg-deb -x``
unpacks them and ``rdata`` reads the .rda files. Everything goes to a cache folder
outside the repository (``COVAUDIT_TESTDATA`` or ``~/.cache/covaudit-testdata``); the
data are GPL and are never committed. ``fetch_rda`` raises ``OpenDataUnavailable`` with
the reason when apt or the network is missing, and tests skip on it.
"""

from __future__ import annotations

import os
import shutil
import subprocess
from pathlib import Path

PACKAGES = {"fields": "r-cran-fields", "sp": "r-cran-sp"}


class OpenDataUnavailable(RuntimeError):
    """The Debian package could not be fetched or unpacked here."""


def cache_dir() -> Path:
    root = os.environ.get("COVAUDIT_TESTDATA")
    return Path(root) if root else Path.home() / ".cache" / "covaudit-testdata"


def _run(cmd: list[str], cwd: Path) -> None:
    try:
        subprocess.run(cmd, cwd=cwd, check=True, capture_output=True, timeout=300)
    except (OSError, subprocess.CalledProcessError, subprocess.TimeoutExpired) as exc:
        detail = getattr(exc, "stderr", b"") or b""
        raise OpenDataUnavailable(f"{' '.join(cmd)} failed: {exc} "
                                  f"{detail.decode(errors='replace')[-300:]}") from None


def package_root(r_package: str) -> Path:
    """Unpacked tree of the Debian package shipping ``r_package``."""
    deb_name = PACKAGES[r_package]
    root = cache_dir() / deb_name
    if (root / ".done").exists():
        return root
    if shutil.which("apt-get") is None or shutil.which("dpkg-deb") is None:
        raise OpenDataUnavailable("apt-get/dpkg-deb not available on this machine")
    download = cache_dir() / "debs"
    download.mkdir(parents=True, exist_ok=True)
    debs = sorted(download.glob(f"{deb_name}_*.deb"))
    if not debs:
        try:
            _run(["apt-get", "download", deb_name], download)
        except OpenDataUnavailable:
            _run(["apt-get", "update"], download)
            _run(["apt-get", "download", deb_name], download)
        debs = sorted(download.glob(f"{deb_name}_*.deb"))
    if not debs:
        raise OpenDataUnavailable(f"apt-get download {deb_name} produced no .deb file")
    root.mkdir(parents=True, exist_ok=True)
    _run(["dpkg-deb", "-x", str(debs[-1]), str(root)], root)
    (root / ".done").write_text("ok")
    return root


def fetch_rda(r_package: str, dataset: str) -> dict:
    """The objects of ``<dataset>.rda`` of an R package, converted by ``rdata``."""
    import rdata

    root = package_root(r_package)
    matches = list(root.rglob(f"{dataset}.rda")) + list(root.rglob(f"{dataset}.RData"))
    if not matches:
        rdb = list(root.rglob("Rdata.rdb"))
        raise OpenDataUnavailable(
            f"{dataset}.rda not found in {PACKAGES[r_package]}"
            + (" (data stored as a lazy-load Rdata.rdb database)" if rdb else ""))
    return rdata.read_rda(str(matches[0]))
