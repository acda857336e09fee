"""One TCP server per simulated instrument: raw SCPI socket on 127.0.0.1, OS-chosen port.

Wire format (what a VISA ``TCPIP0::host::port::SOCKET`` resource expects): program messages
end with LF (a CR before it is ignored); every reply, binary blocks included, ends with LF;
several query answers in one message are joined with ``;`` (IEEE 488.2 8.4.1).

Each connection runs in its own thread; several clients may connect at once and they share
the instrument (its settings, status registers and error queue), as on a real instrument.

Server-level faults (:class:`drivers.sim.interfaces.Faults`):

- ``drop_connection_after`` N: each connection is closed after its N-th program message has
  been answered; with ``drop_unanswered`` that message is executed but its answer never
  leaves (a link that dies mid-exchange: a checked command and its error query sent as one
  compound message are otherwise always answered before the link closes);
- ``slow_answer_s``: a real-time sleep before every reply;
- ``scpi_error_every`` N: every N-th setting command (not queries, not common commands, so
  the client can still read the queue) is refused with -200 and not executed;
- ``corrupt_block_every`` N: every N-th binary block announces one byte less than it carries
  (one more for an empty block).

Bad input never stops the server: lines over 64 KiB are dropped with -363 Input buffer
overrun; a query left without its terminator when the client disconnects gives -420 Query
UNTERMINATED; a new message arriving while a reply is still blocked in the socket (the client
is not reading) aborts that reply with -410 Query INTERRUPTED (IEEE 488.2 6.3.2.3).
"""

from __future__ import annotations

import logging
import select
import socket
import threading
import time
from types import TracebackType
from typing import Any

from drivers.sim.interfaces import Faults
from drivers.sim.scpi import Block, CommandRejected, ScpiDevice, encode_block

__all__ = ["MAX_LINE_BYTES", "ScpiServer"]

logger = logging.getLogger(__name__)

MAX_LINE_BYTES = 64 * 1024
_POLL_S = 0.2  # how often blocked threads look at the closing flag


class ScpiServer:
    """Serve one :class:`ScpiDevice` on ``host`` (127.0.0.1) at an OS-chosen port."""

    def __init__(
        self,
        device: ScpiDevice | Any,
        faults: Faults | None = None,
        name: str = "instrument",
        host: str = "127.0.0.1",
        port: int = 0,
        line_end: bytes = b"\n",
        reply_end: bytes = b"\n",
    ) -> None:
        # a dialect may end its lines with CR (the byte that ends a program message) and its
        # replies with CR LF; the other line-end byte is then blank space around a message
        self.line_end = line_end[-1:]
        self.reply_end = reply_end
        self.device = device
        self.faults = faults or Faults()
        self.name = name
        self._listener = socket.create_server((host, port))
        self._listener.settimeout(_POLL_S)
        self.host, self.port = self._listener.getsockname()[:2]
        self._closing = threading.Event()
        self._lock = threading.Lock()
        self._connections: set[socket.socket] = set()
        self._threads: list[threading.Thread] = []
        self._setting_count = 0
        self._block_count = 0
        self._acceptor = threading.Thread(
            target=self._accept_loop, name=f"sim-{name}-accept", daemon=True
        )
        self._acceptor.start()
        logger.info("simulated %s listening on %s:%s", name, self.host, self.port)

    @property
    def resource(self) -> str:
        """VISA resource string of this server."""
        return f"TCPIP0::{self.host}::{self.port}::SOCKET"

    # -- lifecycle ---------------------------------------------------------------------------

    def close(self) -> None:
        """Stop accepting, close every connection, join the threads; safe to call twice."""
        if self._closing.is_set():
            return
        self._closing.set()
        try:
            self._listener.close()
        except OSError:  # pragma: no cover - closing a closed socket
            pass
        with self._lock:
            conns = list(self._connections)
        for conn in conns:
            _shutdown(conn)
        self._acceptor.join(timeout=2.0)
        for t in list(self._threads):
            t.join(timeout=2.0)
        logger.info("simulated %s stopped", self.name)

    def __enter__(self) -> ScpiServer:
        return self

    def __exit__(
        self,
        exc_type: type[BaseException] | None,
        exc: BaseException | None,
        tb: TracebackType | None,
    ) -> None:
        self.close()

    # -- accept and serve -----------------------------------------------------------------------

    def _accept_loop(self) -> None:
        while not self._closing.is_set():
            try:
                conn, peer = self._listener.accept()
            except TimeoutError:
                continue
            except OSError:
                break  # listener closed
            conn.settimeout(_POLL_S)
            conn.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
            with self._lock:
                self._connections.add(conn)
                self._threads = [t for t in self._threads if t.is_alive()]
                thread = threading.Thread(
                    target=self._serve, args=(conn,), name=f"sim-{self.name}-conn", daemon=True
                )
                self._threads.append(thread)
            logger.debug("%s: client %s connected", self.name, peer)
            thread.start()

    def _serve(self, conn: socket.socket) -> None:
        buffer = bytearray()
        discarding = False  # inside an over-long line, waiting for its LF
        messages = 0
        try:
            while not self._closing.is_set():
                nl = buffer.find(self.line_end)
                if nl < 0:
                    if len(buffer) > MAX_LINE_BYTES:
                        if not discarding:
                            self.device.push_error(-363, f"line over {MAX_LINE_BYTES} bytes")
                        discarding = True
                        buffer.clear()
                    chunk = self._recv(conn)
                    if chunk is None:
                        continue
                    if not chunk:  # peer closed
                        if buffer.strip() and not discarding and b"?" in buffer:
                            self.device.push_error(-420, "no terminator before disconnect")
                        return
                    buffer += chunk
                    continue
                line = bytes(buffer[:nl])
                del buffer[: nl + 1]
                if discarding:
                    discarding = False
                    continue
                if len(line) > MAX_LINE_BYTES:
                    self.device.push_error(-363, f"line over {MAX_LINE_BYTES} bytes")
                    continue
                if not line.strip():
                    continue
                messages += 1
                items = self.device.execute(line, self._unit_filter)
                limit = self.faults.drop_connection_after
                if limit is not None and messages >= limit and self.faults.drop_unanswered:
                    logger.info("%s: fault: dropping the link before answering", self.name)
                    return
                if items:
                    if self.faults.slow_answer_s > 0:
                        time.sleep(self.faults.slow_answer_s)
                    if not self._send(conn, self._encode(items), buffer):
                        return
                if limit is not None and messages >= limit:
                    logger.info("%s: fault: dropping the link after %s messages", self.name, limit)
                    return
        except OSError as exc:
            logger.debug("%s: connection ended: %s", self.name, exc)
        finally:
            with self._lock:
                self._connections.discard(conn)
            _shutdown(conn)

    def _recv(self, conn: socket.socket) -> bytes | None:
        """Next bytes from the peer, ``b""`` at end of stream, None on a poll timeout."""
        try:
            return conn.recv(65536)
        except TimeoutError:
            return None
        except ConnectionResetError:
            return b""

    def _send(self, conn: socket.socket, data: bytes, buffer: bytearray) -> bool:
        """Send a reply; returns False when the peer has gone.

        While the reply is blocked because the peer does not read, incoming bytes are
        collected into ``buffer``; a complete new message there aborts the reply (-410).
        """
        view = memoryview(data)
        while view:
            if self._closing.is_set():
                return False
            readable, writable, _ = select.select([conn], [conn], [], _POLL_S)
            if writable:
                try:
                    sent = conn.send(view)
                except (TimeoutError, BlockingIOError):
                    sent = 0
                view = view[sent:]
                continue
            if readable:
                chunk = self._recv(conn)
                if chunk == b"":
                    return False
                if chunk:
                    buffer += chunk
                    if self.line_end in buffer:
                        self.device.push_error(-410, "new message before the reply was read")
                        return True
        return True

    # -- faults and encoding ---------------------------------------------------------------------

    def _unit_filter(self, header: str) -> CommandRejected | None:
        every = self.faults.scpi_error_every
        if every is None:
            return None
        with self._lock:
            self._setting_count += 1
            hit = self._setting_count % every == 0
        if hit:
            logger.info("%s: fault: refusing %s with -200", self.name, header)
            return CommandRejected(-200, "injected fault")
        return None

    def _encode(self, items: list) -> bytes:
        parts: list[bytes] = []
        for item in items:
            if isinstance(item, Block):
                parts.append(encode_block(item.payload, self._announce(len(item.payload))))
            else:
                parts.append(str(item).encode("ascii", "replace"))
        return b";".join(parts) + self.reply_end

    def _announce(self, length: int) -> int | None:
        every = self.faults.corrupt_block_every
        if every is None:
            return None
        with self._lock:
            self._block_count += 1
            hit = self._block_count % every == 0
        if not hit:
            return None
        logger.info("%s: fault: corrupting the header of block %s", self.name, self._block_count)
        return length - 1 if length > 0 else 1


def _shutdown(conn: socket.socket) -> None:
    try:
        conn.shutdown(socket.SHUT_RDWR)
    except OSError:
        pass
    try:
        conn.close()
    except OSError:  # pragma: no cover
        pass
