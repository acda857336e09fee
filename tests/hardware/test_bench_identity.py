"""Real instruments: identity and error queue only; nothing is switched on.

Run with ``python3 -m pytest tests/hardware --hardware`` and ``RIG_HARDWARE_BENCH`` set to a
bench file whose resources name real instruments.
"""

from __future__ import annotations

import os

import pytest

from rig.runner.opener import load_bench, open_bench

pytestmark = pytest.mark.hardware


def test_every_instrument_identifies_with_an_empty_error_queue():
    path = os.environ.get("RIG_HARDWARE_BENCH")
    if not path:
        pytest.fail("set RIG_HARDWARE_BENCH to the bench file of the real bench")
    bench = load_bench(path)
    assert bench.simulation is None, "this test is for real hardware"
    with open_bench(bench, operator=lambda message: None) as ob:
        for s in ob._sessions:
            assert ob.identities[s.name].count(",") == 3  # IEEE 488.2 *IDN? has four fields
            assert s.errors() == []
        assert ob.supply.output_is_on() is False
