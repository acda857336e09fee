"""Response data of the simulated instruments: numbers as text and definite-length blocks.

A query handler answers either text (numbers formatted by :func:`format_number`) or a
:class:`Block`, whose IEEE 488.2 header :func:`encode_block` adds when the server puts the
reply on the wire. A definite-length arbitrary block is ``#``, one digit n, n digits of byte
count, the bytes (IEEE 488.2-1992, 8.7.9 definite length arbitrary block response data;
7.7.6 for program data): ``#12AB`` carries ``AB``.
"""

from __future__ import annotations

from dataclasses import dataclass

__all__ = ["Block", "encode_block", "format_number"]


@dataclass(frozen=True)
class Block:
    """A definite-length arbitrary block reply (the payload; the header is added on output)."""

    payload: bytes


def encode_block(payload: bytes, announce: int | None = None) -> bytes:
    """IEEE 488.2 definite-length block ``#<n><len><bytes>`` (IEEE 488.2-1992, 8.7.9).

    ``announce`` overrides the length written in the header (fault injection only).
    """
    length = len(payload) if announce is None else announce
    digits = str(length)
    if len(digits) > 9:
        raise ValueError(f"block of {length} bytes exceeds the 9-digit length field")
    return b"#" + str(len(digits)).encode() + digits.encode() + bytes(payload)


def format_number(x: float) -> str:
    """NR1/NR3 response text for a number (12 significant digits)."""
    if float(x).is_integer() and abs(x) < 1e15:
        return str(int(x))
    return format(float(x), ".12g").upper()
