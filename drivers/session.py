"""One SCPI session to one instrument over PyVISA (pyvisa-py, ``@py``, by default).

Everything the rest of the project knows about PyVISA lives here. Lower-layer errors are
translated once, at this boundary, into the project's tree (``rigbase/errors.py``):

- ``VisaIOError`` timeout -> :class:`InstrumentTimeout`
- ``OSError`` (broken pipe, refused, reset), ``InvalidSession``, a peer that closed the
  link -> :class:`ConnectionLost`
- a malformed IEEE 488.2 block -> :class:`BlockFormatError`
- an entry in the instrument's error queue after a configuring command -> :class:`ScpiError`

Recovery follows ``../shared/PYVISA-NOTES.md``: after a timeout the late reply is drained
before anything else is sent (it would otherwise answer the next query) and a query that is
safe to repeat is repeated once; after a lost link the session closes the resource, backs
off, reopens a bounded number of times and re-runs the caller's set-up callback.

Two pyvisa-py 0.8.1 details are handled here, measured on raw sockets:

- ``Resource.clear()`` never returns once the peer has closed the socket (``select`` keeps
  reporting it readable while ``recv`` returns nothing). On a pyvisa-py socket the session
  therefore drains the socket itself like ``clear()`` (read until a quiet spell; 0.25 s here
  against 0.1 s there, to catch replies a little later) but stops at end-of-file and reports
  the lost link.
- A read after the peer closed spins until the full timeout. Before each exchange the session
  peeks at the socket (one non-blocking syscall) so a dropped link is found at once.
- Small writes wait for the peer's delayed ACK unless TCP_NODELAY is set, and pyvisa-py does
  not accept VI_ATTR_TCPIP_NODELAY; the session sets the socket option itself.
These use the pyvisa-py session object behind the resource when there is one, and fall back
to plain PyVISA calls on every other backend and transport.
"""

from __future__ import annotations

import enum
import logging
import math
import os
import re
import select
import socket
import threading
import time
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from types import TracebackType
from typing import Any, Literal, TypeVar

import numpy as np
import pyvisa
from pyvisa import constants
from pyvisa import errors as visa_errors

from drivers.profile import Profile
from rigbase.errors import (
    BlockFormatError,
    ConnectionLost,
    InstrumentError,
    InstrumentTimeout,
    LimitError,
    ScpiError,
)

__all__ = ["BlockDType", "ByteOrder", "ScpiSession", "parse_error_reply", "parse_block_header"]

log = logging.getLogger(__name__)

BlockDType = Literal["int8", "int16", "float32"]
ByteOrder = Literal["big", "little"]
SetupCallback = Callable[["ScpiSession"], None]

_T = TypeVar("_T")

_DTYPES = {"int8": "i1", "int16": "i2", "float32": "f4"}
_ORDERS = {"big": ">", "little": "<"}
_MAX_ERRORS_DRAINED = 64  # a queue that never empties must not hang the session
_DRAIN_QUIET_S = 0.25  # silence that ends a drain (pyvisa-py's clear() waits 0.1 s)
_MAX_RECV = 4 << 20  # receive size for block payloads (pyvisa-py's default is 4096)
# '<code>,"<message>"': the comma is required, so a stray late answer such as "0" or "1" is
# never mistaken for an empty error queue
_ERROR_RE = re.compile(r'^\s*([+-]?\d+)\s*,\s*"?(.*?)"?\s*$', re.DOTALL)
_CONNECTION_CODES = {
    constants.StatusCode.error_connection_lost,
    constants.StatusCode.error_invalid_object,
    constants.StatusCode.error_closing_failed,
    constants.StatusCode.error_resource_not_found,
}


class _State(enum.Enum):
    OPEN = "open"
    CLOSED = "closed"


def parse_error_reply(text: str) -> tuple[int, str]:
    """Split an error-queue answer ``-113,"Undefined header"`` into (code, message).

    IEEE 488.2 string data doubles an embedded quote; it is undoubled here.
    Raises ValueError when ``text`` is not of that form.
    """
    m = _ERROR_RE.match(text)
    if not m:
        raise ValueError(f"not an error-queue answer: {text!r}")
    return int(m.group(1)), (m.group(2) or "").replace('""', '"')


def parse_block_header(head: bytes) -> tuple[int, int]:
    """Validate the first two bytes of a definite-length block (``#`` and the digit count).

    Returns (header length in bytes, number of length digits). IEEE 488.2 definite-length
    block: ``#``, one digit n in 1..9, n digits of byte count, the bytes (REFERENCES.md
    section 5). Raises ValueError with the reason.
    """
    if len(head) < 2 or head[:1] != b"#":
        raise ValueError(f"reply does not start with '#': {head[:16]!r}")
    digit = head[1:2]
    if not digit.isdigit():
        raise ValueError(f"'#' is followed by {digit!r}, not a digit 1-9")
    ndigits = int(digit)
    if ndigits == 0:
        raise ValueError("indefinite-length block (#0) is not supported over a socket")
    return 2 + ndigits, ndigits


class ScpiSession:
    """An open SCPI conversation with one instrument.

    ``resource`` is a VISA resource string (``TCPIP0::127.0.0.1::5025::SOCKET``, ...);
    ``name`` is the role or nickname used in every error and log line; ``profile`` supplies
    the common commands (``*IDN?``, error queue...). ``timeout_s`` is the time allowed for
    each low-level read, in seconds. On a lost link the session reopens up to
    ``reconnect_attempts`` times, waiting ``reconnect_backoff_s`` x attempt number before each,
    and then calls ``setup(session)`` if given. ``resource_manager`` lets several sessions
    share one PyVISA resource manager; otherwise the session owns one for ``backend``.
    """

    def __init__(
        self,
        resource: str,
        name: str,
        *,
        profile: Profile,
        backend: str = "@py",
        timeout_s: float = 5.0,
        reconnect_attempts: int = 3,
        reconnect_backoff_s: float = 1.0,
        resource_manager: pyvisa.ResourceManager | None = None,
        setup: SetupCallback | None = None,
    ) -> None:
        if not (isinstance(timeout_s, int | float) and math.isfinite(timeout_s) and timeout_s > 0):
            raise LimitError(f"{name}: timeout_s must be a positive number of seconds")
        if reconnect_attempts < 0 or not reconnect_backoff_s >= 0:
            raise LimitError(f"{name}: reconnect_attempts and reconnect_backoff_s must be >= 0")
        self._resource_name = resource
        self._name = name
        self._profile = profile
        self._timeout_s = float(timeout_s)
        self._reconnect_attempts = int(reconnect_attempts)
        self._backoff_s = float(reconnect_backoff_s)
        self.setup: SetupCallback | None = setup
        self._extra = {"instrument": name}
        self._lock = threading.RLock()
        self._recovering = False
        self._interrupted = False
        self._busy_s = 0.0  # wall time spent in exchanges (benchmarks split I/O from the rest)
        self._generation = 0  # counts successful reconnects
        self._res: Any = None
        self._own_rm = resource_manager is None
        try:
            self._rm = resource_manager or pyvisa.ResourceManager(backend)
        except (OSError, ValueError, visa_errors.Error) as exc:
            raise ConnectionLost(
                name, None, f"cannot load VISA backend {backend!r}: {exc}"
            ) from exc
        self._state = _State.OPEN
        try:
            self._open()
        except BaseException:
            self._state = _State.CLOSED
            if self._own_rm:
                self._rm.close()
            raise

    # -- properties ---------------------------------------------------------------------------
    @property
    def name(self) -> str:
        """Name of the instrument in errors and logs."""
        return self._name

    @property
    def resource_name(self) -> str:
        """The VISA resource string."""
        return self._resource_name

    @property
    def profile(self) -> Profile:
        """The command dialect this session was opened with."""
        return self._profile

    @property
    def timeout_s(self) -> float:
        """Time allowed for each low-level read, seconds."""
        return self._timeout_s

    @property
    def busy_s(self) -> float:
        """Wall time spent inside exchanges with the instrument so far, seconds."""
        return self._busy_s

    @property
    def closed(self) -> bool:
        """True once :meth:`close` has been called."""
        return self._state is _State.CLOSED

    def __repr__(self) -> str:
        return f"ScpiSession({self._resource_name!r}, {self._name!r}, {self._state.value})"

    # -- public exchanges ---------------------------------------------------------------------
    def write(self, command: str, *, check: bool = True, repeatable: bool = True) -> None:
        """Send ``command``; with ``check``, read the error queue and raise :class:`ScpiError`.

        ``repeatable`` allows sending the command again after a reconnect (setting commands
        are; a command whose repetition matters is not). Only a checked write learns that
        the link dropped just after the command was sent; it then sends it again once.
        """
        with self._lock:
            for attempt in (1, 2):
                self._exchange(command, repeatable, lambda: self._do_write(command))
                if not check:
                    return
                sent_on = self._generation
                self.check_errors(command)
                if self._generation == sent_on:
                    return
                # The link was re-opened after the command went out. A socket write
                # "succeeds" into a connection the instrument is already closing, so whether
                # the command arrived is unknown: send it again if that is safe.
                if not repeatable or attempt == 2:
                    raise ConnectionLost(
                        self._name, command, "link lost right after sending; delivery unknown"
                    )
                log.info(
                    "%s: link re-opened after %r; sending it again",
                    self._name,
                    command,
                    extra=self._extra,
                )

    def query(
        self, command: str, *, repeatable: bool = True, timeout_s: float | None = None
    ) -> str:
        """Send ``command`` and return the answer line without its terminator.

        ``timeout_s`` overrides the session timeout for this reply (seconds). A query with
        ``repeatable`` is repeated once after a timeout and after a reconnect.
        """
        return self._exchange(command, repeatable, lambda: self._do_query(command, timeout_s))

    def query_float(self, command: str, *, repeatable: bool = True) -> float:
        """:meth:`query` parsed as one number (InstrumentError if it is not one)."""
        text = self.query(command, repeatable=repeatable)
        try:
            return float(text)
        except ValueError:
            raise InstrumentError(self._name, command, f"expected a number, got {text!r}") from None

    def query_int(self, command: str, *, repeatable: bool = True) -> int:
        """:meth:`query` parsed as one integer (``+8`` and ``8.0`` accepted)."""
        value = self.query_float(command, repeatable=repeatable)
        if not value.is_integer():
            raise InstrumentError(self._name, command, f"expected an integer, got {value!r}")
        return int(value)

    def query_block(
        self,
        command: str,
        dtype: BlockDType = "int8",
        byte_order: ByteOrder = "big",
        timeout_s: float | None = None,
        *,
        repeatable: bool = True,
    ) -> np.ndarray:
        """Send ``command`` and decode its IEEE 488.2 definite-length block.

        Returns a read-only 1-D array of ``dtype`` in native byte order; ``byte_order`` is how
        the instrument sends it. ``timeout_s`` (seconds) overrides the timeout for every read
        of this block; the first read must cover any acquisition still running.
        """
        if dtype not in _DTYPES:
            raise LimitError(f"{self._name}: block dtype {dtype!r} not one of {sorted(_DTYPES)}")
        if byte_order not in _ORDERS:
            raise LimitError(f"{self._name}: byte order {byte_order!r} not 'big' or 'little'")
        wire = np.dtype(_ORDERS[byte_order] + _DTYPES[dtype])
        return self._exchange(command, repeatable, lambda: self._do_block(command, wire, timeout_s))

    def identify(self) -> str:
        """The instrument's ``*IDN?`` answer."""
        return self.query(self._profile.command("common", "identify"))

    def reset(self) -> None:
        """``*RST``: the instrument's reset state; the error queue is checked afterwards."""
        self.write(self._profile.command("common", "reset"))

    def clear_status(self) -> None:
        """``*CLS``: clear the status registers and the error queue."""
        self.write(self._profile.command("common", "clear_status"), check=False)

    def wait_complete(self, timeout_s: float | None = None) -> None:
        """``*OPC?``: return once every pending operation has finished (``timeout_s`` in s)."""
        cmd = self._profile.command("common", "operation_complete")
        text = self.query(cmd, timeout_s=timeout_s)
        if text.strip().lstrip("+") not in ("1", "1.0"):
            raise InstrumentError(self._name, cmd, f"expected 1, got {text!r}")

    def errors(self) -> list[tuple[int, str]]:
        """Empty the instrument's error queue: every (code, message) until code 0."""
        cmd = self._profile.command("common", "next_error")
        found: list[tuple[int, str]] = []
        for _ in range(_MAX_ERRORS_DRAINED):
            text = self.query(cmd)
            try:
                code, message = parse_error_reply(text)
            except ValueError:
                raise InstrumentError(self._name, cmd, f"cannot parse {text!r}") from None
            if code == 0:
                return found
            found.append((code, message))
        log.warning(
            "%s: error queue still not empty after %d reads",
            self._name,
            _MAX_ERRORS_DRAINED,
            extra=self._extra,
        )
        return found

    def check_errors(self, command: str | None = None) -> None:
        """Drain the error queue; raise :class:`ScpiError` for its first entry, if any."""
        found = self.errors()
        if not found:
            return
        code, message = found[0]
        exc = ScpiError(self._name, command, code, message)
        for other_code, other_message in found[1:]:
            exc.add_note(f'also queued: {other_code},"{other_message}"')
        log.warning("%s: %r raised %s", self._name, command, found, extra=self._extra)
        raise exc

    def close(self) -> None:
        """Close the resource (and the resource manager this session owns); safe twice."""
        with self._lock:
            if self._state is _State.CLOSED:
                return
            self._state = _State.CLOSED
            self._close_resource()
            if self._own_rm:
                try:
                    self._rm.close()
                except (OSError, visa_errors.Error) as exc:
                    log.debug(
                        "%s: closing resource manager: %s", self._name, exc, extra=self._extra
                    )
            log.debug("%s: closed", self._name, extra=self._extra)

    def __enter__(self) -> ScpiSession:
        return self

    def __exit__(
        self,
        exc_type: type[BaseException] | None,
        exc: BaseException | None,
        tb: TracebackType | None,
    ) -> None:
        self.close()

    # -- recovery -----------------------------------------------------------------------------
    def _exchange(self, command: str, repeatable: bool, op: Callable[[], _T]) -> _T:
        """Run ``op`` with timeout and lost-link recovery (see the module docstring)."""
        with self._lock:
            started = time.perf_counter()
            try:
                return self._exchange_locked(command, repeatable, op)
            finally:
                self._busy_s += time.perf_counter() - started

    def _exchange_locked(self, command: str, repeatable: bool, op: Callable[[], _T]) -> _T:
        if self._state is _State.CLOSED:
            raise InstrumentError(self._name, command, "session is closed")
        retried_timeout = False
        reconnects = 0
        if self._interrupted:
            # the last exchange was cut short (Ctrl-C, SIGTERM) between write and read:
            # its reply may still be on its way and must not answer this command
            self._interrupted = False
            self._drain_quietly(command)
        while True:
            try:
                with self._translate(command):
                    self._check_link()
                    return op()
            except InstrumentTimeout as exc:
                try:
                    self._drain(command)
                except ConnectionLost as lost:
                    lost.__cause__ = exc
                    failure: ConnectionLost = lost
                else:
                    self._raise_if_refused(command, exc)
                    if repeatable and not retried_timeout:
                        retried_timeout = True
                        log.info(
                            "%s: %r timed out; late reply drained, asking again",
                            self._name,
                            command,
                            extra=self._extra,
                        )
                        continue
                    raise
            except ConnectionLost as lost:
                failure = lost
            except BaseException as exc:
                if not isinstance(exc, Exception):
                    self._interrupted = True  # KeyboardInterrupt and the like
                raise
            # the link is gone: reopen, unless we are already inside a reopen's set-up
            if self._recovering or reconnects >= self._reconnect_attempts:
                raise failure
            reconnects = self._reconnect(command, reconnects, failure)
            if not repeatable:
                raise ConnectionLost(
                    self._name,
                    command,
                    "link was lost and has been re-opened; the command was not repeated",
                ) from failure

    def _raise_if_refused(self, command: str, timeout: InstrumentTimeout) -> None:
        """After a timeout: an instrument that refused a query queues an error and sends no
        answer (IEEE 488.2 behaviour); report that error instead of asking again."""
        cmd = self._profile.command("common", "next_error")
        found: list[tuple[int, str]] = []
        try:
            with self._translate(cmd):
                for _ in range(_MAX_ERRORS_DRAINED):
                    code, message = parse_error_reply(self._do_query(cmd, None))
                    if code == 0:
                        break
                    found.append((code, message))
        except (InstrumentError, ValueError) as exc:
            # no usable answer either: the original timeout is the better report
            log.debug(
                "%s: error queue unreadable after timeout: %s", self._name, exc, extra=self._extra
            )
            self._drain_quietly(command)
            return
        if found:
            code, message = found[0]
            err = ScpiError(self._name, command, code, message)
            for other_code, other_message in found[1:]:
                err.add_note(f'also queued: {other_code},"{other_message}"')
            raise err from timeout

    def _drain_quietly(self, command: str) -> None:
        try:
            self._drain(command)
        except InstrumentError as exc:
            log.debug("%s: drain: %s", self._name, exc, extra=self._extra)

    def _reconnect(self, command: str, done: int, failure: ConnectionLost) -> int:
        """Reopen until it works or the attempts run out; returns attempts used so far."""
        last: Exception = failure
        while done < self._reconnect_attempts:
            done += 1
            wait = self._backoff_s * done
            log.warning(
                "%s; reconnect %d/%d in %.3g s",
                last,
                done,
                self._reconnect_attempts,
                wait,
                extra=self._extra,
            )
            self._close_resource()
            time.sleep(wait)  # real time on purpose: the remote end recovers in real time
            try:
                self._open()
                if self.setup is not None:
                    self._recovering = True
                    try:
                        self.setup(self)
                    finally:
                        self._recovering = False
                self._generation += 1
                log.info("%s: reconnected", self._name, extra=self._extra)
                return done
            except ConnectionLost as exc:
                last = exc
            except InstrumentTimeout as exc:
                last = ConnectionLost(self._name, command, f"no answer after reconnect: {exc}")
        raise ConnectionLost(
            self._name, command, f"gave up after {done} reconnect attempt(s): {last}"
        ) from last

    @contextmanager
    def _translate(self, command: str | None) -> Iterator[None]:
        """Map PyVISA and OS exceptions to the project's tree (once, here)."""
        try:
            yield
        except InstrumentError:
            raise  # already ours (TimeoutError/ConnectionError are OSErrors: keep them apart)
        except visa_errors.VisaIOError as exc:
            if exc.error_code == constants.StatusCode.error_timeout:
                raise InstrumentTimeout(self._name, command, "no answer in time") from exc
            if exc.error_code in _CONNECTION_CODES:
                raise ConnectionLost(self._name, command, exc.description) from exc
            raise InstrumentError(self._name, command, f"VISA error: {exc.description}") from exc
        except visa_errors.InvalidSession as exc:
            raise ConnectionLost(self._name, command, "VISA session is no longer valid") from exc
        except UnicodeDecodeError as exc:
            raise InstrumentError(self._name, command, f"answer is not ASCII text: {exc}") from exc
        except OSError as exc:
            raise ConnectionLost(self._name, command, f"{type(exc).__name__}: {exc}") from exc

    def _open(self) -> None:
        ms = max(1, round(self._timeout_s * 1000))
        try:
            res = self._rm.open_resource(
                self._resource_name,
                read_termination="\n",
                write_termination="\n",
                timeout=ms,
                open_timeout=ms,
            )
        except (visa_errors.Error, OSError, ValueError) as exc:
            raise ConnectionLost(
                self._name, None, f"cannot open {self._resource_name}: {exc}"
            ) from exc
        except Exception as exc:  # pyvisa-py raises a bare Exception when a connect times out
            raise ConnectionLost(
                self._name, None, f"cannot open {self._resource_name}: {exc}"
            ) from exc
        self._res = res
        sock = self._socket()
        if sock is not None:
            # pyvisa-py connects without blocking and reports success even when refused; the
            # socket's pending error tells the truth now rather than at the first write
            err = sock.getsockopt(socket.SOL_SOCKET, socket.SO_ERROR)
            if err:
                self._close_resource()
                raise ConnectionLost(
                    self._name, None, f"cannot open {self._resource_name}: {os.strerror(err)}"
                )
            # Without TCP_NODELAY a command followed at once by the error-queue query waits
            # for the instrument's delayed ACK: measured 45 ms per checked write on loopback,
            # 0.14 ms with it. pyvisa-py 0.8.1 refuses VI_ATTR_TCPIP_NODELAY (its setter is
            # not wired up), so the option is set on the socket.
            sock.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
        log.debug("%s: opened %s", self._name, self._resource_name, extra=self._extra)

    def _close_resource(self) -> None:
        res, self._res = self._res, None
        if res is None:
            return
        try:
            res.close()
        except (visa_errors.Error, OSError) as exc:
            log.debug("%s: closing resource: %s", self._name, exc, extra=self._extra)

    def _backend_session(self) -> Any:
        """The pyvisa-py session object behind the resource, or None on other backends."""
        sessions = getattr(getattr(self._rm, "visalib", None), "sessions", None)
        if self._res is None or not isinstance(sessions, dict):
            return None
        return sessions.get(self._res.session)

    def _socket(self) -> socket.socket | None:
        """The raw TCP socket of a pyvisa-py ``::SOCKET`` resource, else None."""
        sock = getattr(self._backend_session(), "interface", None)
        return sock if isinstance(sock, socket.socket) else None

    def _check_link(self) -> None:
        """Before an exchange: find a closed link now, and discard a stale late reply."""
        if self._res is None:
            raise ConnectionLost(self._name, None, "not connected")
        sock = self._socket()
        if sock is None:
            return
        try:
            peek = sock.recv(1, socket.MSG_PEEK | socket.MSG_DONTWAIT)
        except BlockingIOError:
            return  # nothing waiting: the normal case
        if not peek:
            raise ConnectionLost(self._name, None, "the instrument closed the connection")
        log.warning(
            "%s: discarding unsolicited bytes before the next command",
            self._name,
            extra=self._extra,
        )
        self._drain(None)

    def _drain(self, command: str | None) -> None:
        """Throw away whatever the instrument still sends (a late reply, a block's tail)."""
        res = self._res
        if res is None:
            return
        sock = self._socket()
        if sock is None:
            with self._translate(command):
                res.clear()
            return
        with self._translate(command):
            res.flush(constants.BufferOperation.discard_read_buffer_no_io)
        deadline = time.monotonic() + max(1.0, self._timeout_s)
        dropped = 0
        try:
            while time.monotonic() < deadline:
                ready, _, _ = select.select([sock], [], [], _DRAIN_QUIET_S)
                if not ready:
                    break
                data = sock.recv(1 << 16)
                if not data:
                    raise ConnectionLost(
                        self._name, command, "the instrument closed the connection"
                    )
                dropped += len(data)
        except OSError as exc:
            if isinstance(exc, InstrumentError):
                raise
            raise ConnectionLost(self._name, command, f"{type(exc).__name__}: {exc}") from exc
        log.debug("%s: drained %d late byte(s)", self._name, dropped, extra=self._extra)

    # -- raw operations (inside _translate) ---------------------------------------------------
    def _do_write(self, command: str) -> None:
        log.debug("%s << %s", self._name, command, extra=self._extra)
        self._res.write(command)

    def _do_query(self, command: str, timeout_s: float | None) -> str:
        log.debug("%s << %s", self._name, command, extra=self._extra)
        with self._timeout(timeout_s):
            self._res.write(command)
            reply = str(self._res.read()).strip()
        log.debug("%s >> %s", self._name, reply, extra=self._extra)
        return reply

    @contextmanager
    def _timeout(self, timeout_s: float | None) -> Iterator[None]:
        if timeout_s is None:
            yield
            return
        res = self._res
        res.timeout = max(1, round(timeout_s * 1000))
        try:
            yield
        finally:
            try:
                res.timeout = max(1, round(self._timeout_s * 1000))
            except (visa_errors.Error, OSError) as exc:  # resource died meanwhile
                log.debug("%s: restoring timeout: %s", self._name, exc, extra=self._extra)

    def _do_block(self, command: str, wire: np.dtype, timeout_s: float | None) -> np.ndarray:
        res = self._res
        log.debug("%s << %s", self._name, command, extra=self._extra)
        with self._timeout(timeout_s):
            res.write(command)
            head = res.read_bytes(2)
            try:
                _, ndigits = parse_block_header(head)
            except ValueError as exc:
                self._drain(command)
                raise BlockFormatError(self._name, command, str(exc)) from None
            digits = res.read_bytes(ndigits)
            if not digits.isdigit():
                self._drain(command)
                raise BlockFormatError(
                    self._name, command, f"length field {digits!r} is not {ndigits} digits"
                )
            nbytes = int(digits)
            payload = self._read_counted(command, nbytes + 1)  # + the LF ending the reply
        if payload[-1:] != b"\n":
            self._drain(command)
            raise BlockFormatError(
                self._name,
                command,
                f"header announced {nbytes} bytes but the block is not followed by LF",
            )
        if nbytes % wire.itemsize:
            raise BlockFormatError(
                self._name, command, f"{nbytes} bytes is not a whole number of {wire.name} values"
            )
        log.debug("%s >> block of %d bytes", self._name, nbytes, extra=self._extra)
        data = np.frombuffer(payload, dtype=wire, count=nbytes // wire.itemsize)
        if not wire.isnative and wire.itemsize > 1:
            data = data.astype(wire.newbyteorder("="))
            data.flags.writeable = False
        return data

    def _read_counted(self, command: str, count: int) -> bytes:
        """Exactly ``count`` bytes with the read termination off (a payload holds LF bytes).

        One counted viRead through PyVISA; pyvisa-py's receive size is raised for the
        duration (it is 4096 bytes, one ``recv`` and ``select`` each) and everything is
        restored in ``finally``. ``tests/perf/bench_block.py`` measures the gain.
        """
        res = self._res
        backend = self._backend_session()
        old_recv = getattr(backend, "max_recv_size", None)
        res.read_termination = None
        try:
            if isinstance(old_recv, int):
                backend.max_recv_size = max(old_recv, min(count, _MAX_RECV))
            chunks: list[bytes] = []
            got = 0
            with res.ignore_warning(
                constants.StatusCode.success_max_count_read,
                constants.StatusCode.success_device_not_present,
            ):
                while got < count:
                    chunk, _status = res.visalib.read(res.session, count - got)
                    if not chunk:
                        break
                    chunks.append(chunk)
                    got += len(chunk)
            if got < count:
                raise BlockFormatError(
                    self._name, command, f"block ended after {got} of {count} bytes"
                )
            return chunks[0] if len(chunks) == 1 else b"".join(chunks)
        finally:
            try:
                res.read_termination = "\n"
                if isinstance(old_recv, int):
                    backend.max_recv_size = old_recv
            except (visa_errors.Error, OSError) as exc:
                log.debug("%s: restoring termination: %s", self._name, exc, extra=self._extra)
