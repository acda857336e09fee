"""The SCPI server core through pyvisa-py over TCP: identity, syntax, status, errors, faults.

Every instrument is reached only as a VISA resource (``pyvisa.ResourceManager("@py")``),
as hardware would be. Error numbers are checked against the SCPI-1999 error list (SCPI-1999
Vol. 2, 21.8); numbers and clauses quoted from memory are marked "(from memory)".
"""

from __future__ import annotations

import socket
import time
from collections.abc import Iterator
from dataclasses import replace

import pytest
import pyvisa
from pyvisa.errors import VisaIOError

from drivers.sim.bench import SimBench
from drivers.sim.interfaces import Faults, WorldConfig
from tests.sim_support import (
    error_codes,
    open_instrument,
    query_raw_block,
    start_double_bench,
)

CONFIG = WorldConfig(meter_model="test-double", noise_volts=1e-4, seed=7)


@pytest.fixture(scope="module")
def bench() -> Iterator[SimBench]:
    with start_double_bench(CONFIG) as sim:
        yield sim


@pytest.fixture
def supply(rm: pyvisa.ResourceManager, bench: SimBench):
    inst = open_instrument(rm, bench.resources["supply"])
    inst.write("*RST;*CLS")
    yield inst
    inst.close()


def test_identities_are_invented_and_distinct(rm: pyvisa.ResourceManager, bench: SimBench) -> None:
    ids = {}
    for role, resource in bench.resources.items():
        assert resource.startswith("TCPIP0::127.0.0.1::") and resource.endswith("::SOCKET")
        inst = open_instrument(rm, resource)
        ids[role] = inst.query("*IDN?").split(",")
        inst.close()
    # IEEE 488.2-1992, 10.14 *IDN? (from memory): four comma-separated fields: maker, model,
    # serial, firmware
    assert all(len(fields) == 4 and fields[0] == "SIMULATED" for fields in ids.values())
    assert len({tuple(f) for f in ids.values()}) == 4


@pytest.mark.parametrize(
    "command",
    ["SOURce:VOLTage:LEVel:IMMediate:AMPLitude 12.5", "SOUR:VOLT:LEV:IMM:AMPL 12.5",
     "source:voltage 12.5", "VoLt 12.5", ":VOLT:LEVEL 12.5", "volt 12.5V", "VOLT 12500 mV",
     "VOLT 0.0125KV", "VOLT 1.25E1"],
)  # fmt: skip
def test_long_short_mixed_case_and_suffixes(supply, command: str) -> None:
    # SCPI-1999 Vol. 1, 6.2.1: short or long form in any case; IEEE 488.2-1992, 7.7.3
    # suffixes (from memory)
    supply.write(command)
    assert float(supply.query("SOUR:VOLT?")) == pytest.approx(12.5)
    assert error_codes(supply) == []


def test_compound_messages(supply) -> None:
    # SCPI-1999 Vol. 1 ch. 6 (from memory): ';' same subsystem, ';:' back to root; several
    # answers joined with ';' in one response message (IEEE 488.2-1992, 8.4.1, from memory)
    assert supply.query("SOUR:VOLT 10;CURR 0.05;:OUTP:STAT ON;:VOLT?;CURR?;:OUTP?") == ("10;0.05;1")
    assert supply.query("*CLS;VOLT 20;*OPC?;:VOLT?") == "1;20"
    supply.write("SOUR:VOLT 1;OUTP OFF")  # OUTP is not under SOURce: -113, output stays on
    assert error_codes(supply) == [-113]
    assert supply.query("OUTP?") == "1"


def test_min_max_def(supply) -> None:
    # SCPI-1999 Vol. 1, 7.2.1: MIN, MAX, DEF stand for numbers; queries accept them too
    supply.write("VOLT MAX")
    assert float(supply.query("VOLT?")) == CONFIG.supply_max_volts
    assert float(supply.query("VOLT? MIN")) == 0.0
    assert float(supply.query("CURR? MAX")) == CONFIG.supply_max_amps
    supply.write("VOLT DEF;CURR MIN")
    assert supply.query("VOLT?;CURR?") == "0;0"
    assert error_codes(supply) == []


@pytest.mark.parametrize(
    ("command", "code"),
    [("VOLTA 5", -113),            # undefined header
     ("SOUR:VOLT:LEVE 5", -113),   # abbreviation that is neither form
     ("VOLT 2000", -222),          # data out of range (above supply_max_volts)
     ("VOLT -1", -222),
     ("VOLT", -109),               # missing parameter (from memory)
     ("VOLT 1,2", -108),           # parameter not allowed (from memory)
     ("OUTP:STAT MAYBE", -224),    # illegal parameter value (from memory)
     ("VOLT 'x'", -104),           # data type error (from memory)
     ("VOLT 5 PARSECS", -131),     # invalid suffix (from memory)
     ("VOLT (5", -102),            # syntax error (from memory)
     ("MEAS:VOLT:DC", -113)],      # query-only header sent as a command
)  # fmt: skip
def test_error_numbers(supply, command: str, code: int) -> None:
    # SCPI-1999 Vol. 2, 21.8 error numbers ("from memory" where marked)
    supply.write(command)
    assert error_codes(supply) == [code]


def test_error_message_format(supply) -> None:
    # SCPI-1999 Vol. 2, 21.8: '<code>,"<message>"', 0,"No error" when empty
    supply.write("BOGUS")
    answer = supply.query("SYSTem:ERRor:NEXT?")
    assert answer.startswith('-113,"Undefined header')
    assert answer.endswith('"')
    assert supply.query("SYST:ERR?") == '0,"No error"'


def test_queue_overflow(supply) -> None:
    # SCPI-1999 Vol. 2, 21.8: -350 replaces the last entry when the queue is full
    for _ in range(30):
        supply.write("BOGUS")
    codes = error_codes(supply)
    assert codes[-1] == -350
    assert set(codes[:-1]) == {-113}
    assert 10 <= len(codes) < 30


def test_status_registers(supply) -> None:
    # IEEE 488.2-1992, 11.5.1 (from memory): ESR bit 5 command error (32), bit 4 execution
    # error (16); STB bit 5 ESB when ESR & ESE, bit 2 error queue not empty (SCPI-1999)
    supply.write("*ESE 48")
    supply.write("BOGUS")
    supply.write("VOLT 1e9")
    assert int(supply.query("*STB?")) & (32 | 4) == 36
    assert int(supply.query("*ESR?")) == 48
    assert int(supply.query("*ESR?")) == 0
    supply.write("*OPC")
    assert int(supply.query("*ESR?")) == 1
    assert supply.query("*OPC?") == "1"
    assert supply.query("*TST?") == "0"
    supply.write("*CLS;*ESE 0")
    assert supply.query("*STB?") == "0"


def test_rst_restores_defaults(supply) -> None:
    supply.write("VOLT 100;:OUTP ON")
    supply.write("*RST")
    assert supply.query("VOLT?;:OUTP?") == "0;0"


def test_several_clients_at_once(rm: pyvisa.ResourceManager, bench: SimBench) -> None:
    a = open_instrument(rm, bench.resources["supply"])
    b = open_instrument(rm, bench.resources["supply"])
    try:
        assert a.query("VOLT 33;*OPC?") == "1"  # processed before the other link asks
        assert b.query("VOLT?") == "33"  # one instrument behind both links
        b.close()
        assert a.query("*IDN?").startswith("SIMULATED")
        c = open_instrument(rm, bench.resources["supply"])
        assert c.query("VOLT?") == "33"
        c.close()
    finally:
        a.close()


def test_keeps_serving_after_garbage(rm: pyvisa.ResourceManager, bench: SimBench) -> None:
    inst = open_instrument(rm, bench.resources["switch"])
    try:
        inst.write("*CLS")
        inst.write_raw(b"\xff\xfe\x00\x80garbage\n")  # not UTF-8, NUL
        inst.write_raw(b"\n\n\r\n   \n")  # empty lines are no messages
        inst.write_raw(b"A" * (70 * 1024) + b"\n")  # longer than the 64 KiB line limit
        inst.write_raw(b"ROUT:CLOS (@1" + b"," * 100 + b"\n")
        assert inst.query("*IDN?").startswith("SIMULATED,RELAY")
        # -101 invalid character, -363 input buffer overrun, -102 syntax error (all three
        # from memory)
        assert error_codes(inst) == [-101, -363, -102]
    finally:
        inst.close()


def test_query_unterminated_at_disconnect(rm: pyvisa.ResourceManager, bench: SimBench) -> None:
    # SCPI-1999 Vol. 2, 21.8: -420 Query UNTERMINATED; here: a query whose message never
    # got its terminator before the client went away
    inst = open_instrument(rm, bench.resources["meter"])
    inst.write("*CLS")
    inst.write_raw(b"*IDN?")
    inst.close()
    inst = open_instrument(rm, bench.resources["meter"])
    try:
        deadline = time.monotonic() + 5
        codes: list[int] = []
        while not codes and time.monotonic() < deadline:
            codes = error_codes(inst)
        assert codes == [-420]
    finally:
        inst.close()


def test_query_interrupted(rm: pyvisa.ResourceManager, bench: SimBench) -> None:
    # SCPI-1999 Vol. 2, 21.8: -410 Query INTERRUPTED: a new message arrives while the
    # previous answer is still unread (here an 8 MB block the client does not read)
    scope = open_instrument(rm, bench.resources["scope"])
    try:
        scope.write("*RST;*CLS;:SENS:SWE:POIN 4000000;TINT 1e-6;:FORM INT,16")
        scope.query("TRIG:SOUR INT2;LEV 0.01;SLOP NEG;:INIT;*OPC?")
        _charge_and_discharge(rm, bench)
        bench.world.clock.sleep(5.0)
        assert scope.query("STAT:OPER:COND?") == "0"
        scope.write("TRAC:DATA? INT1")
        # the answer has begun (its block header is here) however loaded the machine is:
        # a fixed wait let *OPC overtake the answer's start now and then under load
        assert scope.read_bytes(1) == b"#"
        scope.write("*OPC")
        time.sleep(0.5)
        scope.clear()  # drop what already reached our socket
        deadline = time.monotonic() + 5
        codes: list[int] = []
        while -410 not in codes and time.monotonic() < deadline:
            scope.clear()
            try:
                codes += error_codes(scope)
            except (ValueError, VisaIOError):
                continue  # a leftover piece of the block was read as an answer
        assert -410 in codes
        assert scope.query("*IDN?").startswith("SIMULATED")
    finally:
        scope.close()


def _charge_and_discharge(rm: pyvisa.ResourceManager, bench: SimBench) -> None:
    """Charge the meter input to 50 V, then close the discharge relay (an edge to trigger on)."""
    supply = open_instrument(rm, bench.resources["supply"])
    switch = open_instrument(rm, bench.resources["switch"])
    try:
        # writes are asynchronous: *OPC? makes sure each one acted before virtual time moves
        assert switch.query("ROUT:OPEN:ALL;:ROUT:CLOS (@1);*OPC?") == "1"
        assert supply.query("VOLT 50;:OUTP ON;*OPC?") == "1"
        bench.world.clock.sleep(0.1)
        assert supply.query("OUTP OFF;:VOLT 0;*OPC?") == "1"
        assert switch.query("ROUT:OPEN (@1);:ROUT:CLOS (@2);*OPC?") == "1"
    finally:
        supply.close()
        switch.close()


# -- server-level faults ---------------------------------------------------------------------------


def _faulty(**faults: object) -> SimBench:
    return start_double_bench(replace(CONFIG, faults=Faults(**faults)))


def test_dropped_connection(rm: pyvisa.ResourceManager) -> None:
    with _faulty(drop_connection_after=3) as sim:
        inst = open_instrument(rm, sim.resources["supply"], timeout_ms=1000)
        try:
            assert inst.query("*IDN?").startswith("SIMULATED")
            inst.write("VOLT 5")
            assert inst.query("VOLT?") == "5"  # third message: answered, then the link drops
            with pytest.raises((VisaIOError, OSError)):
                inst.write("*IDN?")
                inst.read()
        finally:
            inst.close()
        again = open_instrument(rm, sim.resources["supply"])
        try:
            assert again.query("VOLT?") == "5"  # the instrument itself kept its state
        finally:
            again.close()


def test_slow_answer(rm: pyvisa.ResourceManager) -> None:
    with _faulty(slow_answer_s=0.3) as sim:
        inst = open_instrument(rm, sim.resources["meter"])
        try:
            start = time.monotonic()
            assert inst.query("*IDN?").startswith("SIMULATED")
            assert time.monotonic() - start >= 0.3
        finally:
            inst.close()


def test_scpi_error_every(rm: pyvisa.ResourceManager) -> None:
    with _faulty(scpi_error_every=3) as sim:
        inst = open_instrument(rm, sim.resources["supply"])
        try:
            for volts in (1, 2, 3, 4, 5, 6):
                inst.write(f"VOLT {volts}")
                value = float(inst.query("VOLT?"))
                codes = error_codes(inst)
                if volts % 3 == 0:  # refused: -200 execution error, setting not applied
                    assert codes == [-200] and value == volts - 1
                else:
                    assert codes == [] and value == volts
        finally:
            inst.close()


def test_corrupt_block_every(rm: pyvisa.ResourceManager) -> None:
    with _faulty(corrupt_block_every=2) as sim:
        scope = open_instrument(rm, sim.resources["scope"])
        try:
            scope.query("SENS:SWE:POIN 1000;TINT 1e-6;:TRIG:SOUR INT2;LEV 0.01;SLOP NEG;*OPC?")
            scope.query("INIT;*OPC?")
            _charge_and_discharge(rm, sim)
            sim.world.clock.sleep(0.01)
            good = query_raw_block(scope, "TRAC:DATA? INT1")
            assert int(good[2 : 2 + int(good[1:2])]) == 1000 and good.endswith(b"\n")
            scope.write("TRAC:DATA? INT1")
            head = bytes(scope.read_bytes(2))
            announced = int(bytes(scope.read_bytes(int(head[1:2]))))
            assert announced != 1000  # the header lies about the payload
            scope.clear()
        finally:
            scope.close()


def test_raw_socket_reply_ends_with_lf(bench: SimBench) -> None:
    # the wire contract of a raw SCPI socket (PYVISA-NOTES.md): LF after every reply
    port = int(bench.resources["meter"].split("::")[2])
    with socket.create_connection(("127.0.0.1", port), timeout=5) as s:
        s.sendall(b"*IDN?;*OPC?\n")
        data = b""
        while not data.endswith(b"\n"):
            data += s.recv(4096)
    assert data.endswith(b";1\n") and data.count(b"\n") == 1
