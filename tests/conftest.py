"""Hardware tests are opt-in: tests marked `hardware` run only with --hardware."""

from __future__ import annotations

import pytest


def pytest_addoption(parser: pytest.Parser) -> None:
    parser.addoption("--hardware", action="store_true", default=False,
                     help="run tests marked 'hardware' (need a real instrument attached)")


def pytest_collection_modifyitems(config: pytest.Config, items: list[pytest.Item]) -> None:
    if config.getoption("--hardware"):
        return
    skip = pytest.mark.skip(reason="needs real hardware; run with --hardware")
    for item in items:
        if "hardware" in item.keywords:
            item.add_marker(skip)
