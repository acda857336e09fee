"""Test options: hardware tests run only when asked for."""

from __future__ import annotations

import pytest


def pytest_addoption(parser: pytest.Parser) -> None:
    parser.addoption(
        "--hardware",
        action="store_true",
        default=False,
        help="run tests that talk to real instruments (bench file in RIG_HARDWARE_BENCH)",
    )


def pytest_collection_modifyitems(config: pytest.Config, items: list[pytest.Item]) -> None:
    if config.getoption("--hardware"):
        return
    skip = pytest.mark.skip(reason="needs real instruments: run with --hardware")
    for item in items:
        if "hardware" in item.keywords:
            item.add_marker(skip)
