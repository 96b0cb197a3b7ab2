"""Benchmarks run only when asked for: ``pytest tests/bench --benchmark-only``."""

import pytest


def pytest_collection_modifyitems(config: pytest.Config, items: list[pytest.Item]) -> None:
    if config.getoption("benchmark_only", default=False):
        return
    skip = pytest.mark.skip(reason="benchmark: run with `pytest tests/bench --benchmark-only`")
    for item in items:
        if "tests/bench" in str(item.fspath).replace("\\", "/"):
            item.add_marker(skip)
