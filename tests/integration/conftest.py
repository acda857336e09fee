"""Fixtures shared by the integration tests."""

from __future__ import annotations

from collections.abc import Iterator

import pytest
import pyvisa


@pytest.fixture(scope="module")
def rm() -> Iterator[pyvisa.ResourceManager]:
    """One pyvisa-py resource manager per test module (the tests' own VISA client)."""
    manager = pyvisa.ResourceManager("@py")
    yield manager
    manager.close()
