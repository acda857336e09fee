"""A simulated instrument behind a serial port: a pseudo-terminal instead of a USB adapter.

:class:`PtyServer` opens a pseudo-terminal pair (``os.openpty``), serves one device on the
master side and hands out the slave's path (``/dev/pts/N``): pyserial opens it like any
serial port, and so does pyvisa-py as ``ASRL/dev/pts/N::INSTR``. The client's read
timeouts, terminations and baud-rate setting therefore go through the real serial code.

Like a UART set to the wrong speed, the simulated port drops whatever arrives while the
client's baud rate differs from the instrument's (``baud_rate``): the instrument sees only
noise and answers nothing. (A pseudo-terminal keeps the speed setting but has no parity or
stop bits on the wire, so those cannot be told apart here.) A program message ends with the
last byte of ``line_end``; replies end with ``reply_end``.
"""

from __future__ import annotations

import logging
import os
import select
import termios
import threading
import tty
from types import TracebackType
from typing import Any

__all__ = ["PtyServer"]

logger = logging.getLogger(__name__)

_POLL_S = 0.1
_SPEEDS = {
    getattr(termios, f"B{b}"): b
    for b in (1200, 2400, 4800, 9600, 19200, 38400, 57600, 115200)
    if hasattr(termios, f"B{b}")
}


class PtyServer:
    """Serve ``device`` (``execute(line) -> items``) on a pseudo-terminal; see the module."""

    def __init__(
        self,
        device: Any,
        name: str = "instrument",
        *,
        baud_rate: int = 9600,
        line_end: bytes = b"\n",
        reply_end: bytes = b"\n",
    ) -> None:
        self.device = device
        self.name = name
        self.baud_rate = baud_rate
        self.line_end = line_end[-1:]
        self.reply_end = reply_end
        self._master, self._slave = os.openpty()
        tty.setraw(self._slave)  # no echo, no CR/LF translation: bytes pass as sent
        self.path = os.ttyname(self._slave)
        self.dropped = 0  # bytes dropped for a wrong baud rate (tests)
        self._closing = threading.Event()
        self._thread = threading.Thread(target=self._serve, name=f"sim-{name}-pty", daemon=True)
        self._thread.start()
        logger.info("simulated %s on serial port %s", name, self.path)

    @property
    def resource(self) -> str:
        """VISA resource string of the port."""
        return f"ASRL{self.path}::INSTR"

    def client_baud(self) -> int | None:
        """The baud rate the client set on the port (None when not a standard one)."""
        speed = termios.tcgetattr(self._master)[5]
        return _SPEEDS.get(speed)

    def _serve(self) -> None:
        buffer = bytearray()
        while not self._closing.is_set():
            try:
                ready, _, _ = select.select([self._master], [], [], _POLL_S)
                if not ready:
                    continue
                chunk = os.read(self._master, 65536)
            except OSError:
                if self._closing.is_set():
                    return
                continue  # no client on the slave side yet (EIO): wait for one
            if self.client_baud() != self.baud_rate:
                self.dropped += len(chunk)
                continue
            buffer += chunk
            while (nl := buffer.find(self.line_end)) >= 0:
                line = bytes(buffer[:nl]).strip()
                del buffer[: nl + 1]
                if not line:
                    continue
                items = self.device.execute(line)
                if items:
                    reply = b";".join(str(i).encode("ascii", "replace") for i in items)
                    try:
                        os.write(self._master, reply + self.reply_end)
                    except OSError as exc:
                        logger.debug("%s: reply lost: %s", self.name, exc)

    def close(self) -> None:
        """Stop serving and close both ends; safe to call twice."""
        if self._closing.is_set():
            return
        self._closing.set()
        self._thread.join(timeout=2.0)
        for fd in (self._master, self._slave):
            try:
                os.close(fd)
            except OSError:
                pass

    def __enter__(self) -> PtyServer:
        return self

    def __exit__(
        self,
        exc_type: type[BaseException] | None,
        exc: BaseException | None,
        tb: TracebackType | None,
    ) -> None:
        self.close()
