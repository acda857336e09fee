"""The PyVISA resource under one SCPI session: open, close, error translation, drain.

:class:`VisaLink` owns one open PyVISA resource and nothing of SCPI. It opens it with LF
termination, maps PyVISA and OS exceptions once into the project's tree
(``rigbase/errors.py``), finds a dropped link before an exchange, throws away late replies,
and overrides the read timeout for one exchange. :mod:`drivers.session` builds the SCPI
exchanges and the recovery on top of it; :mod:`drivers.block` reads binary blocks through it.

Three pyvisa-py 0.8.1 details are handled here, measured on raw sockets:

- ``Resource.clear()`` never returns once the peer has closed the socket (``select`` keeps
  reporting it readable while ``recv`` returns nothing). On a pyvisa-py socket the link
  therefore drains the socket itself like ``clear()`` (read until a quiet spell; 0.25 s here
  against 0.1 s there, to catch replies a little later) but stops at end-of-file and reports
  the lost link.
- A read after the peer closed spins until the full timeout. Before each exchange the link
  peeks at the socket (one non-blocking syscall) so a dropped link is found at once.
- Small writes wait for the peer's delayed ACK unless TCP_NODELAY is set, and pyvisa-py does
  not accept VI_ATTR_TCPIP_NODELAY; the link sets the socket option itself.

These use the pyvisa-py session object behind the resource when there is one, and fall back
to plain PyVISA calls on every other backend and transport.
"""

from __future__ import annotations

import logging
import os
import select
import socket
import time
from collections.abc import Iterator
from contextlib import contextmanager
from typing import Any

import pyvisa
from pyvisa import constants
from pyvisa import errors as visa_errors

from drivers.dialect import Link
from rigbase.errors import ConnectionLost, InstrumentError, InstrumentTimeout

__all__ = ["VisaLink", "serial_settings"]

log = logging.getLogger(__name__)

_DRAIN_QUIET_S = 0.25  # silence that ends a drain (pyvisa-py's clear() waits 0.1 s)
_CONNECTION_CODES = {
    constants.StatusCode.error_connection_lost,
    constants.StatusCode.error_invalid_object,
    constants.StatusCode.error_closing_failed,
    constants.StatusCode.error_resource_not_found,
}


_PARITY = {
    "none": constants.Parity.none,
    "even": constants.Parity.even,
    "odd": constants.Parity.odd,
}
_STOP = {
    1.0: constants.StopBits.one,
    1.5: constants.StopBits.one_and_a_half,
    2.0: constants.StopBits.two,
}
_FLOW = {
    "none": constants.ControlFlow.none,
    "xon_xoff": constants.ControlFlow.xon_xoff,
    "rts_cts": constants.ControlFlow.rts_cts,
}


def serial_settings(res: Any, link: Link) -> None:
    """Baud rate, data bits, parity, stop bits and flow control of a serial (ASRL) resource
    as the profile's ``[link]`` gives them (VISA serial attributes, via pyserial in pyvisa-py)."""
    res.baud_rate = link.baud_rate
    res.data_bits = link.data_bits
    res.parity = _PARITY[link.parity]
    res.stop_bits = _STOP[link.stop_bits]
    res.flow_control = _FLOW[link.flow_control]


def _ms(seconds: float) -> int:
    """A VISA timeout in whole milliseconds, at least 1."""
    return max(1, round(seconds * 1000))


class VisaLink:
    """One PyVISA resource opened from ``rm`` for ``resource_name``.

    ``name`` is the instrument's name in every error and log line; ``timeout_s`` the time
    allowed for each low-level read, seconds. :attr:`res` is the open resource, or None while
    the link is closed (between a lost link and its reopening).
    """

    def __init__(
        self,
        rm: pyvisa.ResourceManager,
        resource_name: str,
        name: str,
        timeout_s: float,
        link: Link | None = None,
    ) -> None:
        self.link = link or Link()
        self.rm = rm
        self.resource_name = resource_name
        self.name = name
        self.timeout_s = timeout_s
        self.extra = {"instrument": name}
        self.res: Any = None

    # -- open and close -----------------------------------------------------------------------
    def open(self) -> None:
        """Open the resource; :class:`ConnectionLost` when the instrument cannot be reached."""
        ms = _ms(self.timeout_s)
        try:
            res = self.rm.open_resource(
                self.resource_name,
                read_termination=self.link.read_termination or None,
                write_termination=self.link.write_termination,
                timeout=ms,
                open_timeout=ms,
            )
            if self.resource_name.upper().startswith("ASRL"):
                serial_settings(res, self.link)
        except (visa_errors.Error, OSError, ValueError) as exc:
            raise ConnectionLost(
                self.name, None, f"cannot open {self.resource_name}: {exc}"
            ) from exc
        except Exception as exc:  # pyvisa-py raises a bare Exception when a connect times out
            raise ConnectionLost(
                self.name, None, f"cannot open {self.resource_name}: {exc}"
            ) from exc
        self.res = res
        sock = self.socket()
        if sock is not None:
            # pyvisa-py connects without blocking and reports success even when refused; the
            # socket's pending error tells the truth now rather than at the first write
            err = sock.getsockopt(socket.SOL_SOCKET, socket.SO_ERROR)
            if err:
                self.close()
                raise ConnectionLost(
                    self.name, None, f"cannot open {self.resource_name}: {os.strerror(err)}"
                )
            # Without TCP_NODELAY a command followed at once by the error-queue query waits
            # for the instrument's delayed ACK: measured 45 ms per checked write on loopback,
            # 0.14 ms with it. pyvisa-py 0.8.1 refuses VI_ATTR_TCPIP_NODELAY (its setter is
            # not wired up), so the option is set on the socket.
            sock.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
        log.debug("%s: opened %s", self.name, self.resource_name, extra=self.extra)

    def close(self) -> None:
        """Close the resource (not the resource manager); safe when already closed."""
        res, self.res = self.res, None
        if res is None:
            return
        try:
            res.close()
        except (visa_errors.Error, OSError) as exc:
            log.debug("%s: closing resource: %s", self.name, exc, extra=self.extra)

    # -- errors -------------------------------------------------------------------------------
    @contextmanager
    def translate(self, command: str | None) -> Iterator[None]:
        """Map PyVISA and OS exceptions to the project's tree (once, here)."""
        try:
            yield
        except InstrumentError:
            raise  # already ours (TimeoutError/ConnectionError are OSErrors: keep them apart)
        except visa_errors.VisaIOError as exc:
            if exc.error_code == constants.StatusCode.error_timeout:
                raise InstrumentTimeout(self.name, command, "no answer in time") from exc
            if exc.error_code in _CONNECTION_CODES:
                raise ConnectionLost(self.name, command, exc.description) from exc
            raise InstrumentError(self.name, command, f"VISA error: {exc.description}") from exc
        except visa_errors.InvalidSession as exc:
            raise ConnectionLost(self.name, command, "VISA session is no longer valid") from exc
        except UnicodeDecodeError as exc:
            raise InstrumentError(self.name, command, f"answer is not ASCII text: {exc}") from exc
        except OSError as exc:
            raise ConnectionLost(self.name, command, f"{type(exc).__name__}: {exc}") from exc

    # -- the pyvisa-py objects behind the resource ---------------------------------------------
    def backend_session(self) -> Any:
        """The pyvisa-py session object behind the resource, or None on other backends."""
        sessions = getattr(getattr(self.rm, "visalib", None), "sessions", None)
        if self.res is None or not isinstance(sessions, dict):
            return None
        return sessions.get(self.res.session)

    def socket(self) -> socket.socket | None:
        """The raw TCP socket of a pyvisa-py ``::SOCKET`` resource, else None."""
        sock = getattr(self.backend_session(), "interface", None)
        return sock if isinstance(sock, socket.socket) else None

    # -- link state -----------------------------------------------------------------------------
    def check(self) -> None:
        """Before an exchange: find a closed link now, and discard a stale late reply."""
        if self.res is None:
            raise ConnectionLost(self.name, None, "not connected")
        sock = self.socket()
        if sock is None:
            return
        try:
            peek = sock.recv(1, socket.MSG_PEEK | socket.MSG_DONTWAIT)
        except BlockingIOError:
            return  # nothing waiting: the normal case
        if not peek:
            raise ConnectionLost(self.name, None, "the instrument closed the connection")
        log.warning(
            "%s: discarding unsolicited bytes before the next command",
            self.name,
            extra=self.extra,
        )
        self.drain(None)

    def drain(self, command: str | None) -> None:
        """Throw away whatever the instrument still sends (a late reply, a block's tail)."""
        res = self.res
        if res is None:
            return
        sock = self.socket()
        if sock is None:
            with self.translate(command):
                res.clear()
            return
        with self.translate(command):
            res.flush(constants.BufferOperation.discard_read_buffer_no_io)
        deadline = time.monotonic() + max(1.0, self.timeout_s)
        dropped = 0
        try:
            while time.monotonic() < deadline:
                ready, _, _ = select.select([sock], [], [], _DRAIN_QUIET_S)
                if not ready:
                    break
                data = sock.recv(1 << 16)
                if not data:
                    raise ConnectionLost(self.name, command, "the instrument closed the connection")
                dropped += len(data)
        except OSError as exc:
            if isinstance(exc, InstrumentError):
                raise
            raise ConnectionLost(self.name, command, f"{type(exc).__name__}: {exc}") from exc
        log.debug("%s: drained %d late byte(s)", self.name, dropped, extra=self.extra)

    def drain_quietly(self, command: str) -> None:
        """:meth:`drain`, logging instead of raising when the link misbehaves."""
        try:
            self.drain(command)
        except InstrumentError as exc:
            log.debug("%s: drain: %s", self.name, exc, extra=self.extra)

    @contextmanager
    def timeout(self, timeout_s: float | None) -> Iterator[None]:
        """Read timeout ``timeout_s`` (seconds) inside the block; None keeps the link's own."""
        if timeout_s is None:
            yield
            return
        res = self.res
        res.timeout = _ms(timeout_s)
        try:
            yield
        finally:
            try:
                res.timeout = _ms(self.timeout_s)
            except (visa_errors.Error, OSError) as exc:  # resource died meanwhile
                log.debug("%s: restoring timeout: %s", self.name, exc, extra=self.extra)
