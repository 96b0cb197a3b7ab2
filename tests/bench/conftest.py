"""Benchmarks run only when asked for, in one process: ``pytest tests/bench
--benchmark-only -n 0`` (the default run's two pytest-xdist workers would share the cores
with the timed code, and pytest-benchmark turns itself off under xdist)."""

import pytest

COMMAND = "pytest tests/bench --benchmark-only -n 0"


def pytest_configure(config: pytest.Config) -> None:
    asked = config.getoption("benchmark_only", default=False)
    if asked and config.getoption("dist", default="no") != "no":
        raise pytest.UsageError(f"benchmarks run in one process: {COMMAND}")


@pytest.hookimpl(tryfirst=True)
def pytest_collection_modifyitems(config: pytest.Config, items: list[pytest.Item]) -> None:
    """Without ``--benchmark-only`` the benchmarks are deselected (before pytest-benchmark
    sees them, so it does not warn about the default run's xdist workers)."""
    if config.getoption("benchmark_only", default=False):
        return
    bench = [item for item in items if "tests/bench" in str(item.fspath).replace("\\", "/")]
    if bench:
        config.hook.pytest_deselected(items=bench)
        items[:] = [item for item in items if item not in bench]
