"""Unit tests of the SCPI server core (parser, status, error queue, blocks) without sockets.

Rules checked come from SCPI-1999 (Vol. 1 syntax and style, Vol. 2 21.8 error list) and
IEEE 488.2-1992; each assertion names the rule and clause it checks, and says "from memory"
where the clause or value is quoted from memory.
"""

from __future__ import annotations

import numpy as np
import pytest
from pyvisa.util import from_ieee_block, to_ieee_block

from drivers.dialect import compound_message
from drivers.sim.scpi import (
    QUEUE_DEPTH,
    Block,
    Call,
    CommandRejected,
    Param,
    ScpiDevice,
    encode_block,
    format_number,
    match_nodes,
    parse_header_pattern,
    parse_params,
)


class _Probe(ScpiDevice):
    """A tiny instrument that records what its handlers receive."""

    def __init__(self) -> None:
        super().__init__("SIMULATED,PROBE,SN0000,0.1")
        self.log: list[tuple[str, object]] = []
        self.volts = 0.0
        self.add(
            "[SOURce]:VOLTage[:LEVel][:IMMediate][:AMPLitude]",
            set=self._set_v,
            query=lambda c: format_number(self.volts),
        )
        self.add("[SOURce]:FREQuency", set=self._set_f)
        self.add("INPut#:COUPling", set=self._coup, query=lambda c: str(c.suffix("INPut")))
        self.add("SYSTem:BEEPer[:IMMediate]", set=lambda c: self.log.append(("beep", 0)),
                 set_args=(0, 0))  # fmt: skip
        self.add("SYSTem:BEEPer:STATe", set=lambda c: self.log.append(("beepst", 1)))
        self.add("ROUTe:CLOSe", set=lambda c: self.log.append(("close", c.params[0].channels())))
        self.add("TEST:BLOCk", query=lambda c: Block(b"AB"))

    def _set_v(self, call: Call) -> None:
        self.volts = call.params[0].number("V", low=0.0, high=1500.0, default=0.0)
        self.log.append(("volts", self.volts))

    def _set_f(self, call: Call) -> None:
        self.log.append(("hz", call.params[0].number("HZ", low=0.0, high=1e12, default=50.0)))

    def _coup(self, call: Call) -> None:
        self.log.append((f"coup{call.suffix('INPut')}", call.params[0].choice("AC", "DC")))


def _errors(dev: ScpiDevice) -> list[int]:
    out = []
    while True:
        answer = dev.execute(b"SYST:ERR?")[0]
        code = int(answer.split(",")[0])
        if code == 0:
            return out
        out.append(code)


@pytest.fixture
def dev() -> _Probe:
    return _Probe()


# -- mnemonics ---------------------------------------------------------------------------------


def test_pattern_short_and_long_forms() -> None:
    nodes = parse_header_pattern("[SOURce]:VOLTage[:LEVel]")
    assert [(n.short, n.long, n.optional) for n in nodes] == [
        ("SOUR", "SOURCE", True),
        ("VOLT", "VOLTAGE", False),
        ("LEV", "LEVEL", True),
    ]


@pytest.mark.parametrize(
    "header",
    ["SOUR:VOLT", "SOURCE:VOLTAGE", "sour:volt", "SoUrCe:VoLtAgE:LeVeL:ImM:AmPl", "VOLT",
     ":VOLT:LEV:IMM:AMPLITUDE", "SOURCE:VOLT:IMMEDIATE"],
)  # fmt: skip
def test_short_long_any_case_and_optional_nodes(dev: _Probe, header: str) -> None:
    # SCPI-1999 Vol. 1, 6.2.1 mnemonics: short or long form in any case, optional nodes
    dev.execute(f"{header} 12".encode())
    assert dev.log[-1] == ("volts", 12.0)
    assert _errors(dev) == []


@pytest.mark.parametrize("header", ["VOL", "VOLTA", "SOURC:VOLT", "VOLT:LEVE", "SOUR:VOLT:XYZ"])
def test_other_abbreviations_are_undefined_headers(dev: _Probe, header: str) -> None:
    # SCPI-1999 Vol. 1, 6.2.1: any abbreviation other than short/long form -> -113
    dev.execute(f"{header} 12".encode())
    assert dev.log == []
    assert _errors(dev) == [-113]


def test_numeric_suffix_defaults_to_one(dev: _Probe) -> None:
    # SCPI-1999 Vol. 1, 6.2.5.2: a missing numeric suffix is 1
    assert dev.execute(b"INP:COUP?;:INP3:COUP?;:INPUT4:COUP?") == ["1", "3", "4"]
    assert match_nodes(parse_header_pattern("INPut#:COUPling"), ["INP2", "COUP"]) == {"INPUT": 2}
    assert match_nodes(parse_header_pattern("INPut#:COUPling"), ["INPU2", "COUP"]) is None


def test_headers_added_later_are_found_after_earlier_lookups(dev: _Probe) -> None:
    # the device remembers resolved headers; a registration must not leave a stale answer
    dev.execute(b"SYST:BEEP:VOL 3")
    assert _errors(dev) == [-113]
    dev.add("SYSTem:BEEPer:VOLume", set=lambda c: dev.log.append(("beepvol", 3)))
    dev.execute(b"SYST:BEEP:VOL 3;:INP2:COUP?;:INP:COUP?")
    assert dev.log[-1] == ("beepvol", 3) and _errors(dev) == []
    assert dev.execute(b"INP2:COUP?;:INP:COUP?;:INP2:COUP?") == ["2", "1", "2"]


# -- compound messages ----------------------------------------------------------------------------


def test_semicolon_continues_in_the_same_subsystem(dev: _Probe) -> None:
    # SCPI-1999 Vol. 1 ch. 6 (from memory): ';' keeps the path of the previous header
    dev.execute(b"SYST:BEEP:STAT 1;IMM")
    assert [k for k, _ in dev.log] == ["beepst", "beep"]
    dev.execute(b"INP2:COUP AC;COUP DC")
    assert dev.log[-2:] == [("coup2", "AC"), ("coup2", "DC")]  # the suffix is part of the path
    assert _errors(dev) == []


def test_semicolon_colon_returns_to_root(dev: _Probe) -> None:
    # SCPI-1999 Vol. 1 ch. 6 (from memory): ';:' returns to the root
    dev.execute(b"SYST:BEEP:STAT 1;:VOLT 3;:SYST:BEEP")
    assert [k for k, _ in dev.log] == ["beepst", "volts", "beep"]
    dev.execute(b"SYST:BEEP:STAT 1;VOLT 3")  # VOLT is not under SYSTem:BEEPer
    assert _errors(dev) == [-113]


def test_common_commands_anywhere_keep_the_path(dev: _Probe) -> None:
    # IEEE 488.2-1992, 7.6.1.2 (from memory): common commands may sit between units without
    # moving the path
    out = dev.execute(b"SYST:BEEP:STAT 1;*IDN?;IMM;*OPC?")
    assert out == ["SIMULATED,PROBE,SN0000,0.1", "1"]
    assert [k for k, _ in dev.log] == ["beepst", "beep"]


def test_command_error_skips_the_rest_execution_error_does_not(dev: _Probe) -> None:
    # IEEE 488.2-1992, 6.1.6.1.1 (from memory): a command error discards the rest of the
    # program message
    assert dev.execute(b"VOLT 1;BOGUS;:VOLT 2") == []
    assert dev.volts == 1.0
    assert _errors(dev) == [-113]
    dev.execute(b"VOLT 5000;:VOLT 7")  # -222 is an execution error: the next unit still runs
    assert dev.volts == 7.0
    assert _errors(dev) == [-222]


def test_checked_command_and_error_query_as_one_message(dev: _Probe) -> None:
    # IEEE 488.2-1992 7.1 (from memory): a program message is program message units separated
    # by ';', executed in order, so the error query after a command sees what that command
    # queued; its answer is the message's only response. The session joins them this way
    # (drivers.dialect.compound_message).
    msg = compound_message("ROUT:CLOS (@4,5)", "SYSTem:ERRor:NEXT?")
    assert dev.execute(msg.encode()) == ['0,"No error"']
    assert dev.log[-1] == ("close", (4, 5))
    # an execution error (-222) queues and the message goes on: the query reports it
    assert dev.execute(compound_message("VOLT 5000", "SYST:ERR?").encode())[0].startswith("-222,")
    assert dev.volts == 0.0
    assert _errors(dev) == []
    # SCPI-1999 Vol. 1 6.2.4 (from memory): without the ':' the query would be looked up under
    # the command's path (ROUTe:SYSTem:ERRor) and be an undefined header
    assert dev.execute(b"ROUT:CLOS (@4);SYST:ERR?") == []
    assert _errors(dev) == [-113]
    # a common query needs no ':' (IEEE 488.2-1992 7.6.1.2, from memory: no path involved)
    assert dev.execute(compound_message("VOLT 5", "*OPC?").encode()) == ["1"]
    assert dev.volts == 5.0


def test_command_error_discards_the_error_query_of_its_message(dev: _Probe) -> None:
    # IEEE 488.2-1992 6.1.6.1.1 (from memory): after a command error the rest of the message
    # is skipped, the joined error query too: no answer comes, the entry stays queued (the
    # session's timeout recovery reads it from the queue)
    assert dev.execute(compound_message("BOGUS 1", "SYST:ERR?").encode()) == []
    assert _errors(dev) == [-113]


# -- parameters ----------------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("text", "volts"),
    [("1.5", 1.5), ("1.5K", 1500.0), ("1.5KV", 1500.0), ("200MV", 0.2), ("200 mV", 0.2),
     ("1E3", 1000.0), ("+2.5e-1", 0.25), (".5", 0.5), ("#H1F", 31.0), ("#B101", 5.0),
     ("#Q17", 15.0), ("MIN", 0.0), ("MAX", 1500.0), ("DEF", 0.0), ("maximum", 1500.0),
     ("500UV", 500e-6), ("1MAV", None), ("7 V", 7.0)],
)  # fmt: skip
def test_numbers_with_multipliers(dev: _Probe, text: str, volts: float | None) -> None:
    # IEEE 488.2-1992, 7.7.2/7.7.3 table 7-2 (from memory): multipliers; M = milli, MA = mega;
    # MIN/MAX/DEF
    dev.execute(f"VOLT {text}".encode())
    if volts is None:  # 1 MV = 1e6 V is out of range
        assert _errors(dev) == [-222]
    else:
        assert dev.log[-1][1] == pytest.approx(volts)
        assert _errors(dev) == []


def test_mhz_is_megahertz(dev: _Probe) -> None:
    # IEEE 488.2-1992, 7.7.3.5 (from memory): MHZ and MOHM are the exceptions to M = milli
    dev.execute(b"FREQ 200MHZ;FREQ 3KHZ;FREQ 2GHZ;FREQ 1MA;FREQ DEF")
    assert [v for _, v in dev.log] == [200e6, 3e3, 2e9, 1e6, 50.0]


@pytest.mark.parametrize("text", ["5 XYZ", "5VV", "5E"])
def test_bad_suffix_is_invalid_suffix(dev: _Probe, text: str) -> None:
    # SCPI-1999 Vol. 2, 21.8 error list (from memory): -131 invalid suffix
    dev.execute(f"VOLT {text}".encode())
    assert _errors(dev) == [-131]


def test_parameter_counts(dev: _Probe) -> None:
    # SCPI-1999 Vol. 2, 21.8 (from memory): -109 missing parameter, -108 parameter not allowed
    dev.execute(b"VOLT")
    dev.execute(b"VOLT 1,2")
    dev.execute(b"SYST:BEEP 3")
    assert _errors(dev) == [-109, -108, -108]


def test_parameter_kinds() -> None:
    p = parse_params("ON, 'it''s', \"a;b\", (@1,3), (@1:4), (@101:105,110), (@4:2), INT,8")
    assert p[0].boolean() is True
    assert p[1].string() == "it's"
    assert p[2].string() == "a;b"
    # SCPI-1999 Vol. 1 channel lists: (@1,2), (@1:4), (@101:105,110)
    assert p[3].channels() == (1, 3)
    assert p[4].channels() == (1, 2, 3, 4)
    assert p[5].channels() == (101, 102, 103, 104, 105, 110)
    assert p[6].channels() == (4, 3, 2)
    assert p[7].choice("INTeger") == "INTeger"
    assert p[8].integer(low=1, high=64) == 8


@pytest.mark.parametrize(("text", "value"), [("ON", True), ("off", False), ("1", True),
                                              ("0", False), ("0.4", False), ("2", True)])  # fmt: skip
def test_booleans(text: str, value: bool) -> None:
    # IEEE 488.2-1992 / SCPI-1999 Vol. 1 boolean data (from memory): ON/OFF or a number
    # rounded, 0 = false
    assert parse_params(text)[0].boolean() is value


def test_wrong_kinds_and_values() -> None:
    with pytest.raises(CommandRejected) as e:
        Param("string", "'x'", "x").number("V")
    assert e.value.code == -104  # SCPI-1999 Vol. 2, 21.8 (from memory): data type error
    with pytest.raises(CommandRejected) as e:
        parse_params("MAYBE")[0].boolean()
    assert e.value.code == -224  # illegal parameter value
    with pytest.raises(CommandRejected) as e:
        parse_params("'open")
    assert e.value.code == -102  # syntax error
    with pytest.raises(CommandRejected) as e:
        parse_params("(@1,x)")
    assert e.value.code == -102


# -- error queue and status ------------------------------------------------------------------------


def test_empty_queue_answers_no_error(dev: _Probe) -> None:
    # SCPI-1999 Vol. 2, 21.8: 0,"No error" when empty
    assert dev.execute(b"SYST:ERR?") == ['0,"No error"']
    assert dev.execute(b"SYSTEM:ERROR:NEXT?") == ['0,"No error"']


def test_queue_overflow_replaces_last_entry(dev: _Probe) -> None:
    # SCPI-1999 Vol. 2, 21.8: on overflow the last entry becomes -350
    for _ in range(QUEUE_DEPTH + 5):
        dev.execute(b"BOGUS")
    assert dev.execute(b"SYST:ERR:COUN?") == [str(QUEUE_DEPTH)]
    codes = _errors(dev)
    assert codes == [-113] * (QUEUE_DEPTH - 1) + [-350]


def test_esr_bits_follow_error_classes(dev: _Probe) -> None:
    # IEEE 488.2-1992, 11.5.1 (from memory): bit 5 (32) command error, 4 (16) execution error,
    # 3 (8) device-dependent error, 2 (4) query error, 0 (1) operation complete, 7 (128) power on
    assert dev.execute(b"*ESR?") == ["128"]
    assert dev.execute(b"*ESR?") == ["0"]
    dev.execute(b"BOGUS")
    assert dev.execute(b"*ESR?") == ["32"]
    dev.execute(b"VOLT 1e6")
    assert dev.execute(b"*ESR?") == ["16"]
    dev.push_error(-350)
    dev.push_error(-410)
    assert dev.execute(b"*ESR?") == [str(8 | 4)]
    dev.execute(b"*OPC")
    assert dev.execute(b"*ESR?") == ["1"]


def test_status_byte_summaries(dev: _Probe) -> None:
    # IEEE 488.2-1992, 11.2 / SCPI-1999 Vol. 1 status reporting (from memory): bit 2 error
    # queue, bit 5 ESB = ESR & ESE, bit 6 MSS
    dev.execute(b"*CLS")
    assert dev.execute(b"*STB?") == ["0"]
    dev.execute(b"*ESE 32;*SRE 32")
    dev.execute(b"BOGUS")
    # MAV (16) too: the two answers before *STB? are still waiting
    assert dev.execute(b"*ESE?;*SRE?;*STB?") == ["32", "32", str(4 | 16 | 32 | 64)]
    dev.execute(b"*CLS")
    assert dev.execute(b"*STB?") == ["0"]
    # bit 4 MAV: an answer of this message is waiting in the output queue
    assert dev.execute(b"*IDN?;*STB?")[1] == "16"
    dev.execute(b"*ESE 256")
    assert _errors(dev) == [-222]


def test_rst_keeps_the_queue_cls_clears_it(dev: _Probe) -> None:
    # IEEE 488.2-1992, 10.32 / 10.3 (from memory): *RST does not clear the queue, *CLS does
    dev.execute(b"BOGUS;")
    dev.execute(b"*RST")
    assert dev.execute(b"SYST:ERR:COUN?") == ["1"]
    dev.execute(b"*CLS")
    assert dev.execute(b"SYST:ERR:COUN?;*ESR?") == ["0", "0"]


@pytest.mark.parametrize(
    ("line", "code"),
    [(b"\xff\xfe", -101), (b"VOLT 1\x7f", -101), (b"\x00VOL\x00T 1", -113), (b"VOLT 'abc", -102), (b"VOLT (1", -102),
     (b";", -102), (b"VOLT 1;;VOLT 2", -102), (b"1VOLT", -102), (b"*", -102), (b"*XYZ", -113),
     (b"VOLT@ 3", -102), (b"VOLT 1,", -102), (b"\xc3\xa9", -101)],
)  # fmt: skip
def test_bad_lines_leave_standard_errors(dev: _Probe, line: bytes, code: int) -> None:
    # SCPI-1999 Vol. 2, 21.8 error list (-101 and -102 from memory)
    dev.execute(line)
    assert _errors(dev) == [code]


def test_whitespace_lines_are_ignored(dev: _Probe) -> None:
    # IEEE 488.2-1992, 7.4.1.2 (from memory): bytes 0x00-0x09 and 0x0B-0x20 are white space
    for line in (b"", b"   ", b"\r", b"\t", b"\x00\x01\x1f"):
        assert dev.execute(line) == []
    assert _errors(dev) == []
    dev.execute(b"\x00VOLT\x01\x027\r")
    assert dev.volts == 7.0 and _errors(dev) == []


# -- blocks --------------------------------------------------------------------------------------


@pytest.mark.parametrize("n", [0, 1, 9, 10, 99, 100, 12345, 1_000_000])
def test_block_encoder_matches_pyvisa(n: int) -> None:
    # reference: pyvisa.util.to_ieee_block / from_ieee_block (IEEE 488.2 definite-length block)
    rng = np.random.default_rng(n)
    values = rng.integers(-128, 128, n).astype(np.int8)
    ours = encode_block(values.tobytes())
    assert ours == to_ieee_block(values.tolist(), datatype="b")
    assert np.array_equal(from_ieee_block(ours, datatype="b", container=np.array), values)


def test_block_encoder_worked_example() -> None:
    # IEEE 488.2-1992, 8.7.9 definite length arbitrary block response data: "#12AB" carries "AB"
    assert encode_block(b"AB") == b"#12AB"
    assert _Probe().execute(b"TEST:BLOC?") == [Block(b"AB")]


def test_headers_listing(dev: _Probe) -> None:
    listed = dev.headers()
    assert "*IDN?" in listed and "SYSTem:ERRor[:NEXT]?" in listed
    assert "INPut#:COUPling" in listed and "INPut#:COUPling?" in listed
