"""Random bytes and random SCPI-like lines against a simulated instrument over a raw socket.

The server must never die or hang (every socket operation has a timeout), and every bad
command must leave an error with a standard SCPI-1999 number (SCPI-1999 Vol. 2, 21.8 error
list; the entries quoted from memory are marked so in drivers/sim/scpi/codes.py).
"""

from __future__ import annotations

import re
import socket
from collections.abc import Iterator

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from drivers.clock import VirtualClock
from drivers.sim.bench import SimBench, start_sim_bench
from drivers.sim.interfaces import WorldConfig
from drivers.sim.scpi import ERROR_MESSAGES, QUEUE_DEPTH
from tests.sim_support import SimpleRcWorld

CONFIG = WorldConfig(meter_model="test-double", seed=11)
STANDARD = set(ERROR_MESSAGES) - {0}
BLANK = bytes(
    [*range(0x00, 0x0A), *range(0x0B, 0x21)]
)  # IEEE 488.2-1992, 7.4.1.2 white space (from memory)
SOCKET_TIMEOUT_S = 5.0


@pytest.fixture(scope="module")
def bench() -> Iterator[SimBench]:
    clock = VirtualClock()
    with start_sim_bench(CONFIG, clock, world=SimpleRcWorld(CONFIG, clock)) as sim:
        yield sim


def _port(bench: SimBench, role: str) -> int:
    return int(bench.resources[role].split("::")[2])


class _Link:
    """A raw TCP link with a timeout on every operation (a hang fails the test)."""

    def __init__(self, port: int) -> None:
        self.sock = socket.create_connection(("127.0.0.1", port), timeout=SOCKET_TIMEOUT_S)
        self.buffer = b""

    def send(self, data: bytes) -> None:
        self.sock.sendall(data)

    def line(self) -> bytes:
        while b"\n" not in self.buffer:
            chunk = self.sock.recv(65536)  # raises TimeoutError if the server hangs
            if not chunk:
                raise ConnectionError("server closed the link")
            self.buffer += chunk
        line, _, self.buffer = self.buffer.partition(b"\n")
        return line

    def close(self) -> None:
        self.sock.close()


def _drain(link: _Link) -> list[int]:
    codes = []
    for _ in range(QUEUE_DEPTH + 1):
        link.send(b"SYST:ERR?\n")
        code = int(link.line().split(b",")[0])
        if code == 0:
            return codes
        codes.append(code)
    raise AssertionError("error queue did not empty")


def _identity(link: _Link) -> bytes:
    link.send(b"*IDN?\n")
    return link.line()


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow,
          HealthCheck.function_scoped_fixture])  # fmt: skip
@given(payload=st.binary(max_size=400), role=st.sampled_from(["supply", "switch", "scope"]))
def test_random_bytes(bench: SimBench, payload: bytes, role: str) -> None:
    port = _port(bench, role)
    link = _Link(port)
    try:
        expected_id = _identity(link)
        _drain(link)
        link.send(payload + b"\n")
        # the identity after the garbage proves the server read past it; answers to random
        # queries (if any formed) come first and are skipped
        link.send(b"*IDN?\n")
        for _ in range(100):
            if link.line() == expected_id:
                break
        else:
            raise AssertionError("no identity after the garbage")
        codes = _drain(link)
        assert set(codes) <= STANDARD, codes
        lines = [ln for ln in payload.split(b"\n") if ln.strip(BLANK)]
        if lines and not any(b"*CLS" in ln.upper() or b"ERR" in ln.upper() for ln in lines):
            assert codes, payload  # garbage lines are bad commands: they leave an error
    finally:
        link.close()
    # a fresh link still works: the server survived
    fresh = _Link(port)
    try:
        assert _identity(fresh) == expected_id
    finally:
        fresh.close()


_MNEMONIC = st.text("ABCDEFGHIJKLMNOPQRSTUVWXYZabcdefghijklmnopqrstuvwxyz", min_size=1, max_size=8)
_TAIL = st.text(
    st.characters(codec="ascii", exclude_characters="\n"), max_size=40
)  # anything after the bad unit: skipped after a command error


# per instrument: a header that takes one parameter, a query-only header, and a header
# that takes none (so the "missing", "extra" and "syntax" cases hit real headers)
_HEADERS = {
    "supply": ("VOLT", "MEAS:VOLT?", "*RST"),
    "switch": ("ROUT:CLOS", "SYST:ERR?", "ROUT:OPEN:ALL"),
    "scope": ("FORM:BORD", "STAT:OPER:COND?", "ABOR"),
    "meter": ("FUNC", "*IDN?", "*CLS"),
}


@st.composite
def _bad_line(draw: st.DrawFn) -> tuple[str, str, set[int]]:
    """(role, message, allowed numbers): the message's first unit is a command error."""
    role = draw(st.sampled_from(sorted(_HEADERS)))
    one_param, query_only, no_param = _HEADERS[role]
    kind = draw(st.sampled_from(["unknown", "abbrev", "badchar", "missing", "extra", "syntax"]))
    if kind == "unknown":  # no header of these instruments starts with XQ
        head = "XQ" + draw(_MNEMONIC) + draw(st.sampled_from(["", "?"]))
        unit, codes = f"{head} {draw(_MNEMONIC)}", {-113}
    elif kind == "abbrev":  # neither short nor long form
        unit, codes = draw(st.sampled_from(["VOLTA 1", "SOURC:VOLT 1", "ROUT:CLO (@1)",
                                            "SYST:ERRO?", "INPU1:COUP AC", "TRIGG:LEV 1"])), {-113}  # fmt: skip
    elif kind == "badchar":
        unit, codes = one_param + draw(st.sampled_from(["@", "$", "{", "!"])) + " 1", {-102}
    elif kind == "missing":
        unit, codes = one_param, {-109}
    elif kind == "extra":
        unit, codes = draw(st.sampled_from([f"{query_only} 1,2", f"{no_param} 3"])), {-108}
    else:
        unit, codes = draw(st.sampled_from([f"{one_param} (1", f"{one_param} 1,", ":"])), {-102}
    tail = draw(_TAIL)
    # a broken tail may make the whole message unparsable first: then one syntax error
    message = f"{unit};{tail}" if tail else unit
    return role, message, codes | ({-102, -101} if tail else set())


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow,
          HealthCheck.function_scoped_fixture])  # fmt: skip
@given(case=_bad_line())
def test_bad_scpi_lines_leave_one_standard_error(
    bench: SimBench, case: tuple[str, str, set[int]]
) -> None:
    role, line, allowed = case
    link = _Link(_port(bench, role))
    try:
        link.send(b"*CLS\n" + line.encode("ascii") + b"\nSYST:ERR:COUN?\n")
        # nothing of the message after its command error runs, so the next answer is ours
        answer = link.line()
        assert re.fullmatch(rb"\d+", answer), answer
        codes = _drain(link)
        assert len(codes) == 1, (line, codes)
        assert codes[0] in allowed and codes[0] in STANDARD, (line, codes)
        assert -199 <= codes[0] <= -100  # SCPI-1999: command errors are -100..-199
    finally:
        link.close()


def test_many_links_and_abrupt_closes(bench: SimBench) -> None:
    port = _port(bench, "meter")
    for i in range(20):
        s = socket.create_connection(("127.0.0.1", port), timeout=SOCKET_TIMEOUT_S)
        s.sendall(b"SENS:FUNC" + b"?" * (i % 2) + b" \x00\xff" * i)  # no terminator, then gone
        s.close()
    link = _Link(port)
    try:
        assert _identity(link).startswith(b"SIMULATED,BENCH-METER")
        assert set(_drain(link)) <= STANDARD
    finally:
        link.close()
