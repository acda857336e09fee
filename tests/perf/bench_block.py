"""Benchmark: one large definite-length block over a loopback socket, three ways.

    python tests/perf/bench_block.py [--points 1000000] [--repeats 30] [--seed 7]

A server thread on 127.0.0.1 answers ``DATA?`` with a block of random int8 codes (seeded,
so about 1 byte in 256 is LF, as in real scope data). The same bytes are read through

- ``ScpiSession.query_block`` (the project's path),
- a plain Python socket (``recv_into`` a preallocated buffer; the floor for Python),
- PyVISA's ``read_bytes(n + 1)`` fast path from ``PYVISA-NOTES.md`` (for comparison),
- stock ``query_binary_values(..., container=np.array)``, only twice: it is very slow.

The fast paths run interleaved, round by round, so machine noise hits them alike; the
medians and their ratios to the plain socket come from one run. Target: the project's
session at most 3x the plain socket.
"""

from __future__ import annotations

import argparse
import socket
import statistics
import sys
import threading
import time
from collections.abc import Callable
from pathlib import Path

import numpy as np
import pyvisa

sys.path.insert(0, str(Path(__file__).resolve().parents[2]))

from drivers.profile import Profile  # noqa: E402
from drivers.session import ScpiSession  # noqa: E402


class BlockServer:
    """Answers ``DATA?`` with ``message`` (header + payload + LF) on every connection."""

    def __init__(self, message: bytes) -> None:
        self.message = message
        self.listener = socket.create_server(("127.0.0.1", 0))
        self.port = self.listener.getsockname()[1]
        self.resource = f"TCPIP0::127.0.0.1::{self.port}::SOCKET"
        threading.Thread(target=self._accept, daemon=True).start()

    def _accept(self) -> None:
        while True:
            try:
                conn, _ = self.listener.accept()
            except OSError:
                return
            conn.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
            threading.Thread(target=self._serve, args=(conn,), daemon=True).start()

    def _serve(self, conn: socket.socket) -> None:
        with conn, conn.makefile("rb") as lines:
            for line in lines:
                if line.strip() == b"DATA?":
                    conn.sendall(self.message)
                elif line.strip() == b"*IDN?":
                    conn.sendall(b"BENCH,BLOCK-SERVER,0,1\n")

    def close(self) -> None:
        try:
            self.listener.shutdown(socket.SHUT_RDWR)
        except OSError:
            pass
        self.listener.close()


def plain_socket_reader(port: int) -> tuple[Callable[[], np.ndarray], Callable[[], None]]:
    """The Python floor: header, then ``recv_into`` one preallocated buffer."""
    sock = socket.create_connection(("127.0.0.1", port))
    sock.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)

    def recv_exact(view: memoryview) -> None:
        got = 0
        while got < len(view):
            k = sock.recv_into(view[got:])
            if not k:
                raise ConnectionError("server closed")
            got += k

    def read() -> np.ndarray:
        sock.sendall(b"DATA?\n")
        head = bytearray(2)
        recv_exact(memoryview(head))
        digits = bytearray(int(head[1:2]))
        recv_exact(memoryview(digits))
        n = int(digits)
        buf = bytearray(n + 1)
        recv_exact(memoryview(buf))
        return np.frombuffer(buf, dtype=np.int8, count=n)

    return read, sock.close


def pyvisa_read_bytes_reader(
    rm: pyvisa.ResourceManager, resource: str
) -> tuple[Callable[[], np.ndarray], Callable[[], None]]:
    """PYVISA-NOTES.md fast path: header, then ``read_bytes(n + 1)`` with termination off."""
    res = rm.open_resource(resource, read_termination="\n", write_termination="\n")

    def read() -> np.ndarray:
        res.write("DATA?")
        head = res.read_bytes(2)
        n = int(res.read_bytes(int(head[1:2])))
        res.read_termination = None
        try:
            data = res.read_bytes(n + 1)
        finally:
            res.read_termination = "\n"
        return np.frombuffer(data, dtype=np.int8, count=n)

    return read, res.close


def time_once(fn: Callable[[], np.ndarray], expected: np.ndarray) -> float:
    t0 = time.perf_counter()
    out = fn()
    dt = time.perf_counter() - t0
    if not np.array_equal(out, expected):
        raise SystemExit("a reader returned different data")
    return dt


def main(argv: list[str] | None = None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--points", type=int, default=1_000_000)
    ap.add_argument("--repeats", type=int, default=30)
    ap.add_argument("--stock-repeats", type=int, default=2)
    ap.add_argument("--seed", type=int, default=7)
    args = ap.parse_args(argv)

    rng = np.random.default_rng(args.seed)
    codes = rng.integers(-128, 128, args.points, dtype=np.int16).astype(np.int8)
    payload = codes.tobytes()
    length = str(len(payload)).encode()
    message = b"#" + str(len(length)).encode() + length + payload + b"\n"
    server = BlockServer(message)
    rm = pyvisa.ResourceManager("@py")
    profile = Profile.load("scpi1999")
    session = ScpiSession(server.resource, "bench", profile=profile, resource_manager=rm)
    plain, close_plain = plain_socket_reader(server.port)
    notes_path, close_notes = pyvisa_read_bytes_reader(rm, server.resource)
    readers: dict[str, Callable[[], np.ndarray]] = {
        "ScpiSession.query_block": lambda: session.query_block("DATA?", "int8", "big"),
        "plain socket (recv_into)": plain,
        "pyvisa read_bytes(n+1), termination off": notes_path,
    }
    try:
        for fn in readers.values():  # warm-up: allocator, page cache, first connection
            time_once(fn, codes)
        times: dict[str, list[float]] = {name: [] for name in readers}
        for _ in range(args.repeats):
            for name, fn in readers.items():
                times[name].append(time_once(fn, codes))
        stock_res = rm.open_resource(server.resource, read_termination="\n", write_termination="\n")
        stock_res.timeout = 120_000
        stock = []
        for _ in range(args.stock_repeats):
            stock.append(
                time_once(
                    lambda: stock_res.query_binary_values(
                        "DATA?", datatype="b", header_fmt="ieee", container=np.array
                    ),
                    codes,
                )
            )
        stock_res.close()
    finally:
        close_plain()
        close_notes()
        session.close()
        rm.close()
        server.close()

    medians = {name: statistics.median(ts) for name, ts in times.items()}
    medians["stock query_binary_values"] = statistics.median(stock)
    base = medians["plain socket (recv_into)"]
    mb = len(message) / 1e6
    print(
        f"block: {args.points:,} int8 points ({mb:.2f} MB), {payload.count(10):,} LF bytes; "
        f"median of {args.repeats} (stock: {args.stock_repeats})"
    )
    print(f"{'path':44s} {'median ms':>10s} {'MB/s':>9s} {'x plain':>8s}")
    for name, t in medians.items():
        print(f"{name:44s} {t * 1e3:10.3f} {mb / t:9.0f} {t / base:8.2f}")
    ratio = medians["ScpiSession.query_block"] / base
    verdict = "meets" if ratio <= 3.0 else "MISSES"
    print(f"ScpiSession / plain socket = {ratio:.2f}x: {verdict} the 3x target")


if __name__ == "__main__":
    main()
