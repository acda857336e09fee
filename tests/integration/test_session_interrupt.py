"""Ctrl-C between a query's write and its read must not let the late reply answer the next
query (the safe-state procedure runs right after an interrupt and must read true answers)."""

from __future__ import annotations

import pytest

from .test_drivers_sim import open_rig


def test_interrupted_query_does_not_answer_the_next_one():
    rig = open_rig()
    try:
        session = rig.sessions["supply"]
        rig.supply.set_voltage(123.0)
        res = session._res  # the pyvisa resource under the session
        real_read = res.read

        def interrupted_read(*a, **kw):
            res.read = real_read
            raise KeyboardInterrupt  # the operator's Ctrl-C lands between write and read

        res.read = interrupted_read
        with pytest.raises(KeyboardInterrupt):
            session.query("*IDN?")
        # the IDN reply is now in flight; the next query must get its own answer
        assert rig.supply.output_is_on() is False
        assert rig.supply.programmed_voltage() == pytest.approx(123.0)
        assert session.errors() == []
    finally:
        rig.close()
