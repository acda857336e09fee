"""Fixtures of the input-file tests (test_files.py, test_sequence_files.py)."""

from __future__ import annotations

import pytest

from rig.runner.opener import load_bench
from tests.file_fixtures import SIM_BENCH


@pytest.fixture
def sim_bench_text() -> str:
    """The demo bench file's text."""
    return SIM_BENCH.read_text(encoding="utf-8")


@pytest.fixture
def sim_bench(tmp_path):
    """The demo bench, loaded."""
    return load_bench(SIM_BENCH)
