"""One SCPI session to one instrument over PyVISA (pyvisa-py, ``@py``, by default).

Everything the rest of the project knows about PyVISA goes through here. Lower-layer errors
are translated once, at this boundary, into the project's tree (``rigbase/errors.py``):

- ``VisaIOError`` timeout -> :class:`InstrumentTimeout`
- ``OSError`` (broken pipe, refused, reset), ``InvalidSession``, a peer that closed the
  link -> :class:`ConnectionLost`
- a malformed IEEE 488.2 block -> :class:`BlockFormatError`
- an entry in the instrument's error queue after a configuring command -> :class:`ScpiError`

This module holds the exchanges (write, query, block query, error queue) and the recovery;
the resource itself (opening, error translation, drains, pyvisa-py socket details) lives in
:mod:`drivers.visalink`, counted binary-block reads in :mod:`drivers.block`.

Recovery (the project's own rules, measured against pyvisa-py 0.8.1 and the simulated
instruments): after a timeout the late reply is drained before anything else is sent (it
would otherwise answer the next query) and a query that is safe to repeat is repeated once;
after a lost link the session closes the resource, backs off, reopens a bounded number of
times and re-runs the caller's set-up callback.
"""

from __future__ import annotations

import enum
import logging
import math
import threading
import time
from collections.abc import Callable
from types import TracebackType
from typing import Any, TypeVar

import numpy as np
import pyvisa
from pyvisa import errors as visa_errors

from drivers.block import (
    BlockDType,
    ByteOrder,
    decode_block,
    parse_block_header,
    read_block,
    wire_dtype,
)
from drivers.dialect import compound_message
from drivers.errorqueue import parse_error_reply, queue_error, read_queue
from drivers.profile import Profile
from drivers.visalink import VisaLink
from rigbase.errors import (
    ConnectionLost,
    InstrumentError,
    InstrumentTimeout,
    LimitError,
    ScpiError,
)

__all__ = ["BlockDType", "ByteOrder", "ScpiSession", "parse_error_reply", "parse_block_header"]

log = logging.getLogger(__name__)

SetupCallback = Callable[["ScpiSession"], None]

_T = TypeVar("_T")


class _State(enum.Enum):
    OPEN = "open"
    CLOSED = "closed"


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
        self._name = name
        self._profile = profile
        self._reconnect_attempts = int(reconnect_attempts)
        self._backoff_s = float(reconnect_backoff_s)
        self.setup: SetupCallback | None = setup
        self._extra = {"instrument": name}
        self._lock = threading.RLock()
        self._recovering = False
        self._interrupted = False
        self._busy_s = 0.0  # wall time spent in exchanges (benchmarks split I/O from the rest)
        self._messages = 0  # messages sent (benchmarks count exchanges per event)
        self._generation = 0  # counts successful reconnects
        self._own_rm = resource_manager is None
        try:
            self._rm = resource_manager or pyvisa.ResourceManager(backend)
        except (OSError, ValueError, visa_errors.Error) as exc:
            raise ConnectionLost(
                name, None, f"cannot load VISA backend {backend!r}: {exc}"
            ) from exc
        self._link = VisaLink(self._rm, resource, name, float(timeout_s), profile.dialect.link)
        self._state = _State.OPEN
        try:
            self._link.open()
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
        return self._link.resource_name

    @property
    def profile(self) -> Profile:
        """The command dialect this session was opened with."""
        return self._profile

    @property
    def timeout_s(self) -> float:
        """Time allowed for each low-level read, seconds."""
        return self._link.timeout_s

    @property
    def busy_s(self) -> float:
        """Wall time spent inside exchanges with the instrument so far, seconds."""
        return self._busy_s

    @property
    def messages_sent(self) -> int:
        """Program messages sent so far (each write, query or block query is one)."""
        return self._messages

    @property
    def closed(self) -> bool:
        """True once :meth:`close` has been called."""
        return self._state is _State.CLOSED

    def __repr__(self) -> str:
        return f"ScpiSession({self.resource_name!r}, {self._name!r}, {self._state.value})"

    # -- public exchanges ---------------------------------------------------------------------
    def write(self, command: str, *, check: bool = True, repeatable: bool = True) -> None:
        """Send ``command``; with ``check``, read the error queue and raise :class:`ScpiError`.

        ``repeatable`` allows sending the command again after a reconnect (setting commands
        are; a command whose repetition matters is not). Only a checked write learns that
        the link dropped just after the command was sent; it then sends it again once.
        """
        if self._profile.dialect.link.acknowledge:
            self._acknowledged(command, repeatable)
            return
        joined = check and self._profile.dialect.compound and self.has_command("next_error")
        with self._lock:
            for attempt in (1, 2):
                if joined:
                    sent_on = self._generation
                    self._checked_compound(command)
                else:
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

    def _checked_compound(self, command: str) -> None:
        """``command`` and the error query as one compound message (``[common] compound``):
        raise :class:`ScpiError` for a queued error, as :meth:`check_errors` would.

        A link lost on the way is reopened here and left to :meth:`write`, which sees the
        new generation and resends only a ``repeatable`` command. A reply that does not come
        (late, drained by the recovery, or none: IEEE 488.2 discards the rest of a message
        after a command error, and the recovery has then reported that error from the queue)
        leaves the queue to a separate read, as a check after a plain write would.
        """
        query = self._profile.command("common", "next_error")
        text = compound_message(command, query)
        sent_on = self._generation
        try:
            reply = self._exchange(command, False, lambda: self._do_query(text, None))
        except ConnectionLost:
            if self._generation == sent_on:
                raise  # never reopened: nothing more to try
            return  # reopened: delivery unknown, write() decides
        except InstrumentTimeout:
            self.check_errors(command)
            return
        try:
            first = parse_error_reply(reply)
        except ValueError:
            raise InstrumentError(self._name, text, f"cannot parse {reply!r}") from None
        if first[0] == 0:
            return
        found = [first, *self.errors()]
        log.warning("%s: %r raised %s", self._name, command, found, extra=self._extra)
        raise queue_error(self._name, command, found)

    def query(
        self, command: str, *, repeatable: bool = True, timeout_s: float | None = None
    ) -> str:
        """Send ``command`` and return the answer line without its terminator.

        ``timeout_s`` overrides the session timeout for this reply (seconds). A query with
        ``repeatable`` is repeated once after a timeout and after a reconnect.
        """
        reply = self._exchange(command, repeatable, lambda: self._do_query(command, timeout_s))
        failed = self._profile.dialect.link.error_match(reply)
        if failed is not None:
            raise ScpiError(self._name, command, *failed)
        return reply

    def _acknowledged(self, command: str, repeatable: bool) -> None:
        """A line-protocol command: the instrument answers the acknowledgement word or one of
        its error lines (``[link] acknowledge`` and ``error_reply`` of the profile)."""
        ack = self._profile.dialect.link.acknowledge
        reply = self.query(command, repeatable=repeatable)
        if reply != ack:
            raise InstrumentError(self._name, command, f"expected {ack!r}, got {reply!r}")

    def has_command(self, operation: str) -> bool:
        """True if the profile gives a common command for ``operation`` (``identify``...)."""
        return self._profile.has_operation("common", operation)

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
        try:
            wire = wire_dtype(dtype, byte_order)
        except ValueError as exc:
            raise LimitError(f"{self._name}: {exc}") from None
        return self._exchange(command, repeatable, lambda: self._do_block(command, wire, timeout_s))

    def identify(self) -> str:
        """The instrument's ``*IDN?`` answer ("" when its profile has no identify command)."""
        if not self.has_command("identify"):
            return ""
        return self.query(self._profile.command("common", "identify"))

    def reset(self) -> None:
        """``*RST``: the instrument's reset state; the error queue is checked afterwards."""
        if not self.has_command("reset"):
            return
        self.write(self._profile.command("common", "reset"))

    def clear_status(self) -> None:
        """``*CLS``: clear the status registers and the error queue."""
        if not self.has_command("clear_status"):
            return
        self.write(self._profile.command("common", "clear_status"), check=False)

    def wait_complete(self, timeout_s: float | None = None) -> None:
        """``*OPC?``: return once every pending operation has finished (``timeout_s`` in s)."""
        cmd = self._profile.command("common", "operation_complete")
        text = self.query(cmd, timeout_s=timeout_s)
        if text.strip().lstrip("+") not in ("1", "1.0"):
            raise InstrumentError(self._name, cmd, f"expected 1, got {text!r}")

    def errors(self) -> list[tuple[int, str]]:
        """Empty the instrument's error queue: every (code, message) until code 0 (nothing for
        an instrument without a queue: it reports errors in its replies instead)."""
        if not self.has_command("next_error"):
            return []
        cmd = self._profile.command("common", "next_error")

        def next_entry() -> tuple[int, str]:
            text = self.query(cmd)
            try:
                return parse_error_reply(text)
            except ValueError:
                raise InstrumentError(self._name, cmd, f"cannot parse {text!r}") from None

        found, emptied = read_queue(next_entry)
        if not emptied:
            log.warning("%s: error queue still not empty", self._name, extra=self._extra)
        return found

    def check_errors(self, command: str | None = None) -> None:
        """Drain the error queue; raise :class:`ScpiError` for its first entry, if any."""
        found = self.errors()
        if found:
            log.warning("%s: %r raised %s", self._name, command, found, extra=self._extra)
            raise queue_error(self._name, command, found)

    def close(self) -> None:
        """Close the resource (and the resource manager this session owns); safe twice."""
        with self._lock:
            if self._state is _State.CLOSED:
                return
            self._state = _State.CLOSED
            self._link.close()
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
            self._link.drain_quietly(command)
        while True:
            try:
                with self._link.translate(command):
                    self._link.check()
                    return op()
            except InstrumentTimeout as exc:
                try:
                    self._link.drain(command)
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
        if not self.has_command("next_error"):
            return
        cmd = self._profile.command("common", "next_error")
        try:
            with self._link.translate(cmd):
                found, _ = read_queue(lambda: parse_error_reply(self._do_query(cmd, None)))
        except (InstrumentError, ValueError) as exc:
            # no usable answer either: the original timeout is the better report
            log.debug(
                "%s: error queue unreadable after timeout: %s", self._name, exc, extra=self._extra
            )
            self._link.drain_quietly(command)
            return
        if found:
            raise queue_error(self._name, command, found) from timeout

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
            self._link.close()
            time.sleep(wait)  # real time on purpose: the remote end recovers in real time
            try:
                self._link.open()
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

    # -- raw operations (inside the link's translate) -----------------------------------------
    @property
    def _res(self) -> Any:
        """The PyVISA resource under the session (None while the link is down)."""
        return self._link.res

    def _do_write(self, command: str) -> None:
        log.debug("%s << %s", self._name, command, extra=self._extra)
        self._messages += 1
        self._link.res.write(command)

    def _do_query(self, command: str, timeout_s: float | None) -> str:
        log.debug("%s << %s", self._name, command, extra=self._extra)
        self._messages += 1
        with self._link.timeout(timeout_s):
            self._link.res.write(command)
            reply = str(self._link.res.read()).strip()
        log.debug("%s >> %s", self._name, reply, extra=self._extra)
        return reply

    def _do_block(self, command: str, wire: np.dtype, timeout_s: float | None) -> np.ndarray:
        log.debug("%s << %s", self._name, command, extra=self._extra)
        self._messages += 1
        with self._link.timeout(timeout_s):
            self._link.res.write(command)
            payload = read_block(self._link, command)
        log.debug("%s >> block of %d bytes", self._name, len(payload), extra=self._extra)
        return decode_block(payload, wire, self._name, command)
