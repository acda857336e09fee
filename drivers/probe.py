"""Finding how an unknown instrument wants to be spoken to, without a profile that works yet.

The commonest reasons a new instrument "times out" under PyVISA are a wrong line end (LF
against CR LF, or none), serial settings (baud rate) and an instrument that answers nothing
to ``*IDN?``. :func:`find_link` tries the candidates one by one with one harmless query and
reads the raw bytes of any answer, so the reply's own line end shows which read termination
fits. Only queries are sent, never a setting command.

Each trial opens the resource afresh (PyVISA applies terminations and serial settings at
open), sends an empty line first to end whatever a previous wrong trial left in the
instrument's input buffer, discards what that provokes, then sends the query.
"""

from __future__ import annotations

import logging
from collections.abc import Iterable
from dataclasses import dataclass

import pyvisa
from pyvisa import errors as visa_errors

from drivers.dialect import Link, termination_name
from drivers.visalink import serial_settings

__all__ = ["BAUD_RATES", "TERMINATIONS", "Trial", "find_link", "probe"]

log = logging.getLogger(__name__)

#: write terminations tried, in order (after the profile's own)
TERMINATIONS = ("\n", "\r\n", "\r", "")
#: serial baud rates tried (after the profile's own), the common ones (common practice)
BAUD_RATES = (9600, 19200, 38400, 57600, 115200)
_QUIET_S = 0.3  # silence that ends a reply read byte by byte


@dataclass(frozen=True)
class Trial:
    """One attempt: the settings tried, the query and the raw answer (None: no answer)."""

    write_termination: str
    baud_rate: int | None
    query: str
    answer: bytes | None

    @property
    def read_termination(self) -> str:
        """The line end the answer ended with ("" when none or no answer)."""
        if not self.answer:
            return ""
        for end in ("\r\n", "\n", "\r"):
            if self.answer.endswith(end.encode()):
                return end
        return ""

    def describe(self) -> str:
        """One line: what was tried and what came back."""
        serial = f", {self.baud_rate} baud" if self.baud_rate else ""
        got = "no answer" if self.answer is None else repr(self.answer.decode("latin-1"))
        return (
            f"{self.query!r} with write termination {termination_name(self.write_termination)}"
            f"{serial}: {got}"
        )


def _read_all(res: pyvisa.resources.MessageBasedResource) -> bytes | None:
    got = bytearray()
    while True:
        try:
            got += res.read_bytes(1)
        except visa_errors.VisaIOError:
            break
    return bytes(got) or None


def probe(
    rm: pyvisa.ResourceManager,
    resource: str,
    query: str,
    write_termination: str,
    link: Link,
    baud_rate: int | None = None,
) -> Trial:
    """Send ``query`` once with ``write_termination`` (and ``baud_rate`` on a serial port)."""
    is_serial = resource.upper().startswith("ASRL")
    ms = round(_QUIET_S * 1000)
    res = rm.open_resource(resource, read_termination=None, write_termination="", timeout=ms)
    try:
        if is_serial:
            serial_settings(res, link)
            if baud_rate is not None:
                res.baud_rate = baud_rate
        end = write_termination or "\r\n"
        res.write_raw(end.encode())  # ends a half line a previous trial left
        _read_all(res)  # and drops what that provoked
        res.write_raw((query + write_termination).encode())
        answer = _read_all(res)
    finally:
        res.close()
    trial = Trial(write_termination, baud_rate if is_serial else None, query, answer)
    log.info("probe %s: %s", resource, trial.describe())
    return trial


def find_link(
    rm: pyvisa.ResourceManager, resource: str, queries: Iterable[str], link: Link
) -> tuple[Trial | None, list[Trial]]:
    """Try each query with each write termination (and, on a serial port, each baud rate)
    until one is answered; returns (the answered trial or None, every trial made).

    The profile's own settings go first, so an instrument that already works costs one trial.
    """
    trials: list[Trial] = []
    terms = [link.write_termination] + [t for t in TERMINATIONS if t != link.write_termination]
    serial = resource.upper().startswith("ASRL")
    bauds: list[int | None] = (
        [link.baud_rate] + [b for b in BAUD_RATES if b != link.baud_rate] if serial else [None]
    )
    for baud in bauds:
        for query in queries:
            for term in terms:
                trial = probe(rm, resource, query, term, link, baud)
                trials.append(trial)
                if trial.answer is not None:
                    return trial, trials
    return None, trials
