"""The relay board on a pseudo-terminal through pyvisa-py's serial resource, and the
dialect-specific behaviour of the simulated supply and relay board as a client sees it.

The serial checks go through the real path: pyvisa-py's ``ASRL<path>::INSTR`` resource,
pyserial underneath, a pseudo-terminal (``os.openpty``) on the instrument's side. What is
checked against outside behaviour: VISA read timeouts raise VI_ERROR_TMO (pyvisa's
``VisaIOError``, VPP-4.3 completion/error codes; pyvisa documentation), pyserial applies the
baud rate to the terminal (termios, POSIX ``cfsetospeed``), and the line ends are the bytes
the profile names.
"""

from __future__ import annotations

import time

import pytest
import pyvisa
from pyvisa import constants

from drivers.profile import Profile
from drivers.session import ScpiSession
from drivers.sim.interfaces import BenchWiring, LoadSpec, SenseSpec, WorldConfig
from drivers.supply import Supply
from drivers.switch import SwitchBoard
from rigbase.errors import InstrumentTimeout, SafetyError, ScpiError
from tests.sim_support import start_double_bench

WIRING = BenchWiring(loads=(LoadSpec("r1k", 1000.0),), sense=SenseSpec(ohms=10.0))
CONFIG = WorldConfig(meter_model="test-double", wiring=WIRING, noise_volts=1e-4, seed=3)


@pytest.fixture(scope="module")
def bench():
    sim = start_double_bench(CONFIG, {"switch": "relay-line", "supply": "supply-b"})
    yield sim
    sim.close()


def _board(rm: pyvisa.ResourceManager, resource: str, *, write: str, baud: int, ms: int):
    res = rm.open_resource(resource, read_termination="\r\n", write_termination=write)
    res.baud_rate = baud
    res.timeout = ms
    return res


def test_relay_board_is_a_serial_resource(bench) -> None:
    assert bench.resources["switch"].startswith("ASRL/dev/pts/")
    assert bench.resources["switch"].endswith("::INSTR")


def test_line_protocol_over_the_pty(rm, bench) -> None:
    res = _board(rm, bench.resources["switch"], write="\r", baud=19200, ms=1000)
    try:
        assert res.interface_type == constants.InterfaceType.asrl
        assert res.query("ON 2") == "OK"
        assert bench.world.relay_commanded([2]) == [True]
        assert res.query("ASK 1 2") == "O C"
        assert res.query("OFF 2") == "OK"
        assert res.query("ASK 2") == "O"
        # its own error lines, no SCPI, no *IDN?
        assert res.query("*IDN?") == "ERR 1 unknown command"
        assert res.query("ON 99").startswith("ERR 3 ")
    finally:
        res.close()


def test_wrong_termination_times_out_after_the_read_timeout(rm, bench) -> None:
    res = _board(rm, bench.resources["switch"], write="\n", baud=19200, ms=300)
    try:
        res.write("ASK 1")  # LF: the board waits for its CR and never answers
        t0 = time.monotonic()
        with pytest.raises(pyvisa.errors.VisaIOError) as info:
            res.read()
        waited = time.monotonic() - t0
        assert info.value.error_code == constants.StatusCode.error_timeout
        assert 0.25 <= waited < 1.5, waited  # the 300 ms read timeout, not longer
        res.write_raw(b"\r")  # the CR ends the pending line: now it answers
        assert res.read() == "O"
    finally:
        res.close()


def test_wrong_baud_rate_gets_no_answer(rm, bench) -> None:
    server = bench.servers["switch"]
    before = server.dropped
    res = _board(rm, bench.resources["switch"], write="\r", baud=9600, ms=300)
    try:
        assert server.client_baud() == 9600  # pyserial set it on the terminal
        res.write("ASK 1")
        with pytest.raises(pyvisa.errors.VisaIOError):
            res.read()
        assert server.dropped > before
    finally:
        res.close()


def test_switch_driver_over_serial(rm, bench) -> None:
    profile = Profile.load("relay-line")
    with ScpiSession(
        bench.resources["switch"], "switch", profile=profile, resource_manager=rm, timeout_s=1.0
    ) as s:
        board = SwitchBoard(s, profile)
        board.transfer([1], [3, 4], clock=bench.world.clock, settle_s=0.0)
        assert board.closed([1, 3, 4]) == [False, True, True]
        assert bench.world.relay_commanded([3, 4]) == [True, True]
        board.open_all()
        assert board.closed([3, 4]) == [False, False]
        assert s.identify() == ""  # no identify command in this dialect
        with pytest.raises(ScpiError) as info:
            s.write("ON 77")
        assert info.value.code == 3 and "ERR" not in info.value.message


def test_supply_needs_its_enable_and_a_closed_interlock(rm, bench) -> None:
    profile = Profile.load("supply-b")
    with ScpiSession(
        bench.resources["supply"], "supply", profile=profile, resource_manager=rm, timeout_s=1.0
    ) as s:
        supply = Supply(s, profile)
        supply.set_voltage(10.0)
        # the output command alone is refused by the instrument (not armed)
        with pytest.raises(ScpiError) as info:
            s.write("HV:GATE 1")
        assert info.value.code == -221
        assert supply.output_is_on() is False
        assert supply.interlock_closed() is True
        supply.output(True)  # the driver arms first
        assert supply.output_is_on() is True
        supply.make_safe()
        assert supply.output_is_on() is False
        # open the bench's interlock loop (the simulated supply's input, set as a wire would)
        speaker = bench.servers["supply"].device
        speaker.interlock_closed = False
        try:
            with pytest.raises(SafetyError):
                supply.output(True)
            assert supply.output_is_on() is False
        finally:
            speaker.interlock_closed = True


def test_supply_without_identify_answers_nothing_to_idn(rm) -> None:
    sim = start_double_bench(CONFIG, {"supply": "supply-c"})
    try:
        profile = Profile.load("supply-c")
        res = rm.open_resource(
            sim.resources["supply"], read_termination="\r\n", write_termination="\r\n", timeout=300
        )
        try:
            res.write("*IDN?")
            with pytest.raises(pyvisa.errors.VisaIOError):
                res.read()
            assert res.query("ERRor?").startswith("-113,")
            assert res.query("POWer?") == "OFF"
        finally:
            res.close()
        with ScpiSession(
            sim.resources["supply"], "supply", profile=profile, resource_manager=rm, timeout_s=0.5
        ) as s:
            assert s.identify() == ""
            with pytest.raises((InstrumentTimeout, ScpiError)):
                s.query("*IDN?", repeatable=False)
    finally:
        sim.close()
