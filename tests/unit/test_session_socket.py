"""ScpiSession against a tiny in-test SCPI server on a real loopback socket (pyvisa-py).

The server runs in a thread on 127.0.0.1 at an OS-chosen port and answers a handful of
made-up commands; every test goes through pyvisa-py's TCPIP SOCKET session exactly as a
bench instrument would. Block decoding is checked against PyVISA's own helpers
(``pyvisa.util.to_ieee_block`` builds the reference block, ``from_ieee_block`` decodes it).
"""

from __future__ import annotations

import logging
import socket
import threading
import time
from collections.abc import Callable, Iterator
from dataclasses import replace

import numpy as np
import pytest
from pyvisa import util as visa_util
from pyvisa.errors import VisaIOError

from drivers.dialect import compound_message
from drivers.profile import Profile
from drivers.session import ScpiSession, parse_block_header, parse_error_reply
from rigbase.errors import (
    BlockFormatError,
    ConnectionLost,
    InstrumentError,
    InstrumentTimeout,
    ScpiError,
)

COMPOUND = Profile.load("scpi1999")  # the shipped profile: [common] compound = true
# the same dialect without compound messages: the tests below that follow each exchange use it
PROFILE = replace(COMPOUND, dialect=replace(COMPOUND.dialect, compound=False))
NEXT_ERROR = PROFILE.command("common", "next_error")

Handler = Callable[["FakeInstrument", socket.socket, str], None]


class FakeInstrument:
    """A line-based SCPI server with an error queue and a few test commands.

    - ``*IDN?`` answers ``TEST,FAKE,0,1``; ``ECHO? x`` answers ``x``; ``COUNT?`` answers how
      many ``COUNT?`` it has seen (so a stale answer is recognisable).
    - ``BAD`` queues -113, ``BAD2`` queues -113 and -222; the error-queue command pops.
    - ``BLOCK?`` sends ``self.block`` (raw reply bytes, header and LF included).
    - ``SLOW?`` answers ``late`` after ``self.delay_s``, then sets ``late_sent``.
    - ``SLOWONCE?`` answers ``first`` after ``self.delay_s`` the first time, ``second`` after.
    - ``HANGUP?`` closes the connection without answering. ``REFUSE?`` queues -230 and sends
      nothing (as IEEE 488.2 instruments do for a query they cannot answer).
    - ``DROP`` closes the connection without doing anything the first ``drop_times`` times.
    - ``SYNTAX`` queues -102 and, as a command error, discards the rest of its message.

    A line may hold several units separated by ``;`` (IEEE 488.2-1992, 7.1 compound program
    messages); a unit's leading ``:`` (back to the root) is dropped, as these headers have no
    path; the answers of the queries go back as one line, separated by ``;`` (8.4.1, response
    message unit separator, from memory). ``received`` has the lines as they came.
    """

    def __init__(self) -> None:
        self.listener = socket.socket(socket.AF_INET, socket.SOCK_STREAM)
        self.listener.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
        self.listener.bind(("127.0.0.1", 0))
        self.listener.listen(8)
        self.port = self.listener.getsockname()[1]
        self.resource = f"TCPIP0::127.0.0.1::{self.port}::SOCKET"
        self.errors: list[tuple[int, str]] = []
        self.block = b"#12AB\n"
        self.delay_s = 0.3
        self.late_sent = threading.Event()
        self.connections = 0
        self.count = 0
        self.slow_seen = 0
        self.drop_times = 0
        self.received: list[str] = []
        self.clients: list[socket.socket] = []
        self._lock = threading.Lock()
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._accept, daemon=True)
        self._thread.start()

    def _accept(self) -> None:
        while not self._stop.is_set():
            try:
                conn, _ = self.listener.accept()
            except OSError:
                return
            with self._lock:
                self.connections += 1
                self.clients.append(conn)
            threading.Thread(target=self._serve, args=(conn,), daemon=True).start()

    def _serve(self, conn: socket.socket) -> None:
        buf = b""
        try:
            while True:
                data = conn.recv(65536)
                if not data:
                    return
                buf += data
                while b"\n" in buf:
                    line, buf = buf.split(b"\n", 1)
                    if not self._message(conn, line.decode().strip()):
                        return
        except OSError:
            return
        finally:
            conn.close()

    def _message(self, conn: socket.socket, line: str) -> bool:
        """One program message: its units in order, their answers sent as one line."""
        self.received.append(line)
        if ";" not in line:
            return self._handle(conn, line)
        answers: list[bytes] = []
        for unit in line.split(";"):  # no test command carries a ';' inside a string
            unit = unit.strip().removeprefix(":")
            if unit == "SYNTAX":
                self.errors.append((-102, "Syntax error"))
                break  # IEEE 488.2-1992 6.1.6.1.1 (from memory): the rest is discarded
            sent: list[bytes] = []
            if not self._handle(_Collect(sent), unit):
                return False
            answers += [b.rstrip(b"\n") for b in sent]
        if answers:
            conn.sendall(b";".join(answers) + b"\n")
        return True

    def _handle(self, conn: socket.socket | _Collect, cmd: str) -> bool:
        reply: bytes | None = None
        if cmd == "*IDN?":
            reply = b"TEST,FAKE,0,1\n"
        elif cmd.startswith("ECHO? "):
            reply = cmd[6:].encode() + b"\n"
        elif cmd == "COUNT?":
            self.count += 1
            reply = f"{self.count}\n".encode()
        elif cmd == "BAD":
            self.errors.append((-113, "Undefined header"))
        elif cmd == "BAD2":
            self.errors += [(-113, "Undefined header"), (-222, 'Data out of range; "x"')]
        elif cmd == NEXT_ERROR:
            code, msg = self.errors.pop(0) if self.errors else (0, "No error")
            reply = f'{code},"{msg.replace(chr(34), chr(34) * 2)}"\n'.encode()
        elif cmd == "BLOCK?":
            reply = self.block
        elif cmd == "SLOW?":
            time.sleep(self.delay_s)
            conn.sendall(b"late\n")
            self.late_sent.set()
        elif cmd == "SLOWONCE?":
            self.slow_seen += 1
            if self.slow_seen == 1:
                time.sleep(self.delay_s)
                reply = b"first\n"
            else:
                reply = b"second\n"
        elif cmd == "HANGUP?":
            return False
        elif cmd == "DROP" and self.drop_times > 0:
            self.drop_times -= 1
            return False
        elif cmd == "SYNTAX":
            self.errors.append((-102, "Syntax error"))
        elif cmd == "REFUSE?":
            self.errors.append((-230, "Data corrupt or stale"))
        if reply is not None:
            conn.sendall(reply)
        return True

    def drop_clients(self) -> None:
        """Close every open connection from the server side (the instrument rebooted)."""
        with self._lock:
            for c in self.clients:
                try:
                    c.shutdown(socket.SHUT_RDWR)
                except OSError:
                    pass
                c.close()
            self.clients.clear()

    def close(self) -> None:
        self._stop.set()
        try:
            # wakes the thread blocked in accept(); close() alone leaves it accepting on Linux
            self.listener.shutdown(socket.SHUT_RDWR)
        except OSError:
            pass
        self.listener.close()
        self._thread.join(2.0)  # a connection accepted just before is in `clients` now
        self.drop_clients()


class _Collect:
    """Stands in for the socket while the units of one compound message are answered."""

    def __init__(self, out: list[bytes]) -> None:
        self.out = out

    def sendall(self, data: bytes) -> None:
        self.out.append(data)


@pytest.fixture
def server() -> Iterator[FakeInstrument]:
    srv = FakeInstrument()
    yield srv
    srv.close()


@pytest.fixture
def session(server: FakeInstrument) -> Iterator[ScpiSession]:
    with ScpiSession(
        server.resource, "fake", profile=PROFILE, timeout_s=0.2, reconnect_backoff_s=0.01
    ) as s:
        yield s


# -- plain exchanges -----------------------------------------------------------------------


def test_identify_query_and_write(session: ScpiSession, server: FakeInstrument) -> None:
    assert session.identify() == "TEST,FAKE,0,1"
    assert session.query("ECHO? hello world") == "hello world"
    session.write("*CLS")
    assert server.received[-2:] == ["*CLS", NEXT_ERROR]  # configuring command, then the check


def test_close_twice_and_use_after_close(server: FakeInstrument) -> None:
    s = ScpiSession(server.resource, "fake", profile=PROFILE, timeout_s=0.2)
    s.close()
    s.close()
    assert s.closed
    with pytest.raises(InstrumentError, match="closed"):
        s.query("*IDN?")


def test_debug_log_names_the_instrument(
    session: ScpiSession, caplog: pytest.LogCaptureFixture
) -> None:
    with caplog.at_level(logging.DEBUG, logger="drivers.session"):
        session.query("ECHO? ping")
    records = [r for r in caplog.records if "ECHO? ping" in r.getMessage()]
    assert records and all(getattr(r, "instrument", None) == "fake" for r in records)
    assert any("ping" in r.getMessage() and ">>" in r.getMessage() for r in caplog.records)


# -- blocks ----------------------------------------------------------------------------------

# numpy dtype name -> struct format character used by pyvisa's block helpers
PYVISA_FORMAT = {"int8": "b", "int16": "h", "float32": "f"}


@pytest.mark.parametrize("dtype", ["int8", "int16", "float32"])
@pytest.mark.parametrize("order", ["big", "little"])
def test_block_decoding_matches_pyvisa_helpers(
    session: ScpiSession, server: FakeInstrument, dtype: str, order: str
) -> None:
    rng = np.random.default_rng(20240601)
    n = 50_000  # larger than any pyvisa-py receive chunk, full of 0x0A bytes
    if dtype == "float32":
        values = rng.standard_normal(n).astype(np.float32)
    else:
        info = np.iinfo(dtype)
        values = rng.integers(info.min, info.max, n, endpoint=True).astype(dtype)
    big = order == "big"
    # reference encoder and decoder: pyvisa.util.to_ieee_block / from_ieee_block
    block = visa_util.to_ieee_block(values.tolist(), PYVISA_FORMAT[dtype], big)
    expected = visa_util.from_ieee_block(block, PYVISA_FORMAT[dtype], big, container=np.array)
    server.block = block + b"\n"
    got = session.query_block("BLOCK?", dtype, order)
    assert got.dtype == np.dtype(dtype) and got.dtype.isnative
    np.testing.assert_array_equal(got, expected)
    np.testing.assert_array_equal(got, values)
    assert b"\n" in block  # the payload really held LF bytes
    assert session.identify() == "TEST,FAKE,0,1"  # stream still in step


def test_block_example_from_ieee4882(session: ScpiSession, server: FakeInstrument) -> None:
    # IEEE 488.2-1992, 8.7.9 definite length arbitrary block response data: "#12AB" carries "AB"
    server.block = b"#12AB\n"
    assert session.query_block("BLOCK?", "int8").tobytes() == b"AB"
    # the widest header: nine length digits
    server.block = b"#9000000002AB\n"
    assert session.query_block("BLOCK?", "int8").tobytes() == b"AB"
    # an empty block is legal
    server.block = b"#10\n"
    assert session.query_block("BLOCK?", "int16").size == 0


def test_block_arrays_are_read_only(session: ScpiSession, server: FakeInstrument) -> None:
    server.block = visa_util.to_ieee_block([1, 2, 3], "h", True) + b"\n"
    arr = session.query_block("BLOCK?", "int16", "big")
    assert arr.tolist() == [1, 2, 3]
    assert not arr.flags.writeable


@pytest.mark.parametrize(
    ("reply", "dtype", "why"),
    [
        (b"12AB\n", "int8", "does not start with '#'"),
        (b"#A2AB\n", "int8", "not a digit"),
        (b"#0AB\n", "int8", "indefinite"),
        (b"#2X2AB\n", "int8", "not 2 digits"),
        (b"#11AB\n", "int8", "not followed by LF"),  # header announces fewer bytes than sent
        (b"#13ABC\n", "int16", "whole number"),
        (b'-113,"Undefined header"\n', "int8", "does not start with '#'"),
    ],
)
def test_malformed_blocks_raise_and_leave_session_usable(
    session: ScpiSession, server: FakeInstrument, reply: bytes, dtype: str, why: str
) -> None:
    server.block = reply
    with pytest.raises(BlockFormatError, match=why) as info:
        session.query_block("BLOCK?", dtype)
    assert info.value.instrument == "fake" and info.value.command == "BLOCK?"
    assert session.identify() == "TEST,FAKE,0,1"


def test_block_shorter_than_announced_times_out_cleanly(
    session: ScpiSession, server: FakeInstrument
) -> None:
    server.block = b"#15AB\n"  # 5 announced, 3 sent (LF counted): the read waits in vain
    with pytest.raises(InstrumentTimeout):
        session.query_block("BLOCK?", "int8", timeout_s=0.1)
    assert session.query("ECHO? after") == "after"
    server.block = b"#12AB\n"
    assert session.query_block("BLOCK?", "int8").tobytes() == b"AB"


def test_parse_block_header_rules() -> None:
    assert parse_block_header(b"#1") == (3, 1)
    assert parse_block_header(b"#9") == (11, 9)
    for bad in (b"", b"#", b"#0", b"1#", b"#x"):
        with pytest.raises(ValueError):
            parse_block_header(bad)


# -- errors ----------------------------------------------------------------------------------


def test_scpi_error_names_instrument_command_code_message(
    session: ScpiSession, server: FakeInstrument
) -> None:
    with pytest.raises(ScpiError) as info:
        session.write("BAD")
    err = info.value
    assert (err.instrument, err.command, err.code, err.message) == (
        "fake",
        "BAD",
        -113,
        "Undefined header",
    )
    assert "fake" in str(err) and "BAD" in str(err) and "-113" in str(err)
    assert session.errors() == []


def test_every_queued_error_is_drained(session: ScpiSession, server: FakeInstrument) -> None:
    with pytest.raises(ScpiError) as info:
        session.write("BAD2")
    assert info.value.code == -113
    assert any("-222" in note for note in info.value.__notes__)
    assert server.errors == []
    session.write("BAD2", check=False)
    # IEEE 488.2 string data doubles an embedded quote; parse_error_reply undoubles it
    assert session.errors() == [(-113, "Undefined header"), (-222, 'Data out of range; "x"')]


def test_parse_error_reply_forms() -> None:
    assert parse_error_reply('0,"No error"') == (0, "No error")
    assert parse_error_reply('+0,"No error"') == (0, "No error")
    assert parse_error_reply('-222,"Data out of range;""x"""') == (-222, 'Data out of range;"x"')
    assert parse_error_reply("-100,Command error") == (-100, "Command error")  # unquoted
    for stray in ("No error", "0", "1", "+1.5E+00"):  # a late answer is not an error reply
        with pytest.raises(ValueError):
            parse_error_reply(stray)


def test_refused_query_reports_the_queued_error(
    session: ScpiSession, server: FakeInstrument
) -> None:
    with pytest.raises(ScpiError) as info:
        session.query("REFUSE?")
    assert info.value.code == -230
    assert isinstance(info.value.__cause__, InstrumentTimeout)
    assert server.received.count("REFUSE?") == 1  # not repeated: the instrument said why


# -- timeouts --------------------------------------------------------------------------------


def test_timeout_surfaces_and_late_reply_is_drained(
    session: ScpiSession, server: FakeInstrument
) -> None:
    with pytest.raises(InstrumentTimeout) as info:
        session.query("SLOW?", repeatable=False)
    assert isinstance(info.value, TimeoutError)
    assert isinstance(info.value.__cause__, VisaIOError)
    assert (info.value.instrument, info.value.command) == ("fake", "SLOW?")
    assert server.late_sent.wait(2.0)
    # the late "late" must not answer the next query
    assert session.query("ECHO? fresh") == "fresh"
    assert session.query("COUNT?") == "1"


def test_repeatable_query_is_asked_again_after_timeout(
    session: ScpiSession, server: FakeInstrument
) -> None:
    assert session.query("SLOWONCE?") == "second"
    assert server.slow_seen == 2
    assert session.query("ECHO? next") == "next"


# -- lost links ------------------------------------------------------------------------------


def test_reconnect_after_the_server_drops_the_link(server: FakeInstrument) -> None:
    calls: list[str] = []
    with ScpiSession(
        server.resource,
        "fake",
        profile=PROFILE,
        timeout_s=0.5,
        reconnect_backoff_s=0.01,
        setup=lambda s: calls.append(s.query("ECHO? setup")),
    ) as s:
        assert s.identify() == "TEST,FAKE,0,1"
        server.drop_clients()
        time.sleep(0.05)
        t0 = time.monotonic()
        assert s.query("COUNT?") == "1"
        assert time.monotonic() - t0 < 0.4  # found at once, not after a timeout
        assert calls == ["setup"]
        assert server.connections == 2


def test_lost_link_mid_query_not_repeated_when_not_repeatable(server: FakeInstrument) -> None:
    with ScpiSession(
        server.resource, "fake", profile=PROFILE, timeout_s=0.2, reconnect_backoff_s=0.01
    ) as s:
        with pytest.raises(ConnectionLost, match="not repeated"):
            s.query("HANGUP?", repeatable=False)
        assert server.received.count("HANGUP?") == 1
        assert s.query("ECHO? back") == "back"
        assert server.connections == 2


def test_gives_up_after_bounded_reconnects(server: FakeInstrument) -> None:
    s = ScpiSession(
        server.resource,
        "fake",
        profile=PROFILE,
        timeout_s=0.2,
        reconnect_attempts=2,
        reconnect_backoff_s=0.01,
    )
    try:
        server.close()  # listener and link gone: nothing to reconnect to
        time.sleep(0.05)
        with pytest.raises(ConnectionLost, match="gave up after 2") as info:
            s.identify()
        assert isinstance(info.value, ConnectionError)
    finally:
        s.close()


def test_dead_port_raises_connection_lost() -> None:
    probe = socket.socket()
    probe.bind(("127.0.0.1", 0))
    port = probe.getsockname()[1]
    probe.close()  # nothing listens there now
    with pytest.raises(ConnectionLost) as info:
        with ScpiSession(
            f"TCPIP0::127.0.0.1::{port}::SOCKET", "ghost", profile=PROFILE, timeout_s=0.2
        ) as s:
            s.identify()
    assert info.value.instrument == "ghost"


# -- checked writes as one compound message ([common] compound) ---------------------------


def _open(server: FakeInstrument, profile: Profile, **kw: object) -> ScpiSession:
    return ScpiSession(
        server.resource, "fake", profile=profile, timeout_s=0.2, reconnect_backoff_s=0.01, **kw
    )


def _sent(profile: Profile, command: str) -> str:
    """The line a checked ``command`` travels in."""
    return compound_message(command, NEXT_ERROR) if profile.dialect.compound else command


def test_only_the_generic_profile_joins_commands_and_the_joiner_follows_4882() -> None:
    assert COMPOUND.dialect.compound and not PROFILE.dialect.compound
    others = ("scope-b", "scope-c", "supply-b", "supply-c", "switch-b", "relay-line")
    assert not any(Profile.load(n).dialect.compound for n in others)
    # IEEE 488.2-1992 7.1: units separated by ';'; SCPI-1999 Vol. 1 6.2.4 (from memory): a
    # leading ':' takes the next header back to the root; a common command needs none
    assert compound_message("ROUT:CLOS (@4)", "SYST:ERR?") == "ROUT:CLOS (@4);:SYST:ERR?"
    assert compound_message("VOLT 1", "*ESR?") == "VOLT 1;*ESR?"


def test_checked_write_is_one_exchange_unchecked_write_stays_alone(server: FakeInstrument) -> None:
    with _open(server, COMPOUND) as s:
        before = s.messages_sent
        s.write("*CLS")
        assert server.received == [f"*CLS;:{NEXT_ERROR}"]
        s.write("*CLS", check=False)
        # a write is not answered: a query after it (lines are served in order) makes sure
        # the server has read it before the list is looked at
        assert s.query("ECHO? x") == "x"
        assert server.received[-2:] == ["*CLS", "ECHO? x"]
        assert s.messages_sent == before + 3


def test_profile_without_compound_keeps_separate_exchanges(server: FakeInstrument) -> None:
    with _open(server, PROFILE) as s:
        before = s.messages_sent
        s.write("*CLS")
        assert server.received == ["*CLS", NEXT_ERROR]
        assert s.messages_sent == before + 2


def test_compound_write_raises_the_instruments_error(server: FakeInstrument) -> None:
    with _open(server, COMPOUND) as s:
        with pytest.raises(ScpiError) as info:
            s.write("BAD2")
        err = info.value
        assert (err.instrument, err.command, err.code, err.message) == (
            "fake",
            "BAD2",
            -113,
            "Undefined header",
        )
        assert any("-222" in note for note in err.__notes__)
        # the first entry came with the command; the rest is read until the queue is empty
        assert server.received == [f"BAD2;:{NEXT_ERROR}", NEXT_ERROR, NEXT_ERROR]
        assert server.errors == []
        s.write("*CLS")  # the session goes on


def test_command_error_that_discards_the_error_query_is_still_reported(
    server: FakeInstrument,
) -> None:
    # no answer comes (the rest of the message was discarded): the timeout recovery reads
    # the queue and reports its entry instead of sending the command again
    with _open(server, COMPOUND) as s:
        with pytest.raises(ScpiError) as info:
            s.write("SYNTAX")
        assert info.value.code == -102 and info.value.command == "SYNTAX"
        assert isinstance(info.value.__cause__, InstrumentTimeout)
        assert server.received.count(f"SYNTAX;:{NEXT_ERROR}") == 1
        assert s.query("ECHO? after") == "after"


@pytest.mark.parametrize("profile", [PROFILE, COMPOUND], ids=["separate", "compound"])
def test_link_lost_after_sending_resends_a_repeatable_write_once(
    server: FakeInstrument, profile: Profile
) -> None:
    server.drop_times = 1
    calls: list[int] = []
    with _open(server, profile, setup=lambda s: calls.append(1)) as s:
        s.write("DROP")
        assert server.received.count(_sent(profile, "DROP")) == 2
        assert calls == [1] and server.connections == 2


@pytest.mark.parametrize("profile", [PROFILE, COMPOUND], ids=["separate", "compound"])
def test_link_lost_after_sending_a_write_that_must_not_repeat(
    server: FakeInstrument, profile: Profile
) -> None:
    server.drop_times = 1
    with _open(server, profile) as s:
        with pytest.raises(ConnectionLost, match="delivery unknown"):
            s.write("DROP", repeatable=False)
        assert server.received.count(_sent(profile, "DROP")) == 1
        s.write("*CLS")  # the reopened link works


@pytest.mark.parametrize("profile", [PROFILE, COMPOUND], ids=["separate", "compound"])
def test_link_lost_twice_after_sending_gives_up(server: FakeInstrument, profile: Profile) -> None:
    server.drop_times = 2
    with _open(server, profile) as s:
        with pytest.raises(ConnectionLost, match="delivery unknown"):
            s.write("DROP")
        assert server.received.count(_sent(profile, "DROP")) == 2
