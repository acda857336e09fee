"""IEEE 488.2 definite-length blocks on the wire: header check, counted read, decoding.

A definite-length arbitrary block (IEEE 488.2-1992, 8.7.9 definite length arbitrary block
response data; 7.7.6 for program data) is ``#``, one digit n in 1..9, n digits giving the
byte count, then exactly that many bytes: ``#12AB`` carries ``AB``. The payload may hold any
byte, LF included, so it is read by count with the read termination off, never line by line.
:func:`read_block` reads one such reply through a :class:`~drivers.visalink.VisaLink` and
:func:`decode_block` turns the bytes into a read-only numpy array; every malformed reply
becomes a :class:`~rigbase.errors.BlockFormatError` after the rest of it has been drained.
"""

from __future__ import annotations

import logging
from typing import Literal

import numpy as np
from pyvisa import constants
from pyvisa import errors as visa_errors

from drivers.visalink import VisaLink
from rigbase.errors import BlockFormatError

__all__ = ["BlockDType", "ByteOrder", "decode_block", "parse_block_header", "read_block"]

log = logging.getLogger(__name__)

BlockDType = Literal["int8", "int16", "float32"]
ByteOrder = Literal["big", "little"]

DTYPES = {"int8": "i1", "int16": "i2", "float32": "f4"}
ORDERS = {"big": ">", "little": "<"}
_MAX_RECV = 4 << 20  # receive size for block payloads (pyvisa-py's default is 4096)


def parse_block_header(head: bytes) -> tuple[int, int]:
    """Validate the first two bytes of a definite-length block (``#`` and the digit count).

    Returns (header length in bytes, number of length digits): ``#``, one digit n in 1..9,
    n digits of byte count, the bytes (IEEE 488.2-1992, 8.7.9). Raises ValueError with the
    reason.
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


def wire_dtype(dtype: str, byte_order: str) -> np.dtype:
    """The numpy dtype of values sent as ``dtype`` in ``byte_order``; ValueError if unknown."""
    if dtype not in DTYPES:
        raise ValueError(f"block dtype {dtype!r} not one of {sorted(DTYPES)}")
    if byte_order not in ORDERS:
        raise ValueError(f"byte order {byte_order!r} not 'big' or 'little'")
    return np.dtype(ORDERS[byte_order] + DTYPES[dtype])


def read_block(link: VisaLink, command: str) -> memoryview:
    """The payload of the block reply now arriving on ``link`` (the query is already sent).

    Reads the header, then the announced bytes plus the LF that ends the reply, by count.
    The payload is a view of the bytes read (no copy of a block of many megabytes).
    """
    res = link.res
    head = res.read_bytes(2)
    try:
        _, ndigits = parse_block_header(head)
    except ValueError as exc:
        link.drain(command)
        raise BlockFormatError(link.name, command, str(exc)) from None
    digits = res.read_bytes(ndigits)
    if not digits.isdigit():
        link.drain(command)
        raise BlockFormatError(
            link.name, command, f"length field {digits!r} is not {ndigits} digits"
        )
    nbytes = int(digits)
    payload = _read_counted(link, command, nbytes + 1)  # + the LF ending the reply
    if payload[-1:] != b"\n":
        link.drain(command)
        raise BlockFormatError(
            link.name,
            command,
            f"header announced {nbytes} bytes but the block is not followed by LF",
        )
    return memoryview(payload)[:-1]


def decode_block(
    payload: bytes | memoryview, wire: np.dtype, name: str, command: str
) -> np.ndarray:
    """``payload`` as a read-only 1-D array in native byte order (``name`` for errors)."""
    nbytes = len(payload)
    if nbytes % wire.itemsize:
        raise BlockFormatError(
            name, command, f"{nbytes} bytes is not a whole number of {wire.name} values"
        )
    data = np.frombuffer(payload, dtype=wire, count=nbytes // wire.itemsize)
    if not wire.isnative and wire.itemsize > 1:
        data = data.astype(wire.newbyteorder("="))
        data.flags.writeable = False
    return data


def _read_counted(link: VisaLink, command: str, count: int) -> bytes:
    """Exactly ``count`` bytes with the read termination off (a payload holds LF bytes).

    One counted viRead through PyVISA; pyvisa-py's receive size is raised for the duration
    (it is 4096 bytes, one ``recv`` and ``select`` each) and everything is restored in
    ``finally``. ``tests/perf/bench_block.py`` measures the gain.
    """
    res = link.res
    backend = link.backend_session()
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
            raise BlockFormatError(link.name, command, f"block ended after {got} of {count} bytes")
        return chunks[0] if len(chunks) == 1 else b"".join(chunks)
    finally:
        try:
            res.read_termination = link.link.read_termination or None
            if isinstance(old_recv, int):
                backend.max_recv_size = old_recv
        except (visa_errors.Error, OSError) as exc:
            log.debug("%s: restoring termination: %s", link.name, exc, extra=link.extra)
