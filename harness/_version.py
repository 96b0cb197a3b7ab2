"""The package version, read once from the installed distribution's metadata.

``pyproject.toml`` is the only place the version is written; this module imports nothing
of the package, so any module may import it without an import-order cycle.
"""

from importlib.metadata import PackageNotFoundError, version

DISTRIBUTION = "covaudit"

try:
    __version__: str = version(DISTRIBUTION)
except PackageNotFoundError:  # a source tree that was never installed
    __version__ = "0+unknown"
