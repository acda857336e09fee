"""A simulated instrument that speaks another dialect: a translator in front of the SCPI one.

:class:`DialectDevice` takes one of the shipped dialect profiles (``drivers/profiles/*.toml``)
as the instrument's own command set and an instrument of the generic SCPI-1999 simulation
(``inner``) as its insides. Each incoming line is matched against the dialect's command
templates (the text a driver would send, any case, any run of blanks); the values in it are
read back (numbers, channel numbers, channel lists, and the instrument's words mapped back
through ``[<role>.values]``), and the same operation is run on ``inner`` in its SCPI-1999
form. The answer is then put in the dialect's shape: a combined scaling reply reordered, one
scaling quantity per query, codes as ASCII integers, status bits moved, relay readback words,
an acknowledgement or an error line on a line protocol.

What the dialect lacks, the instrument lacks: a line that matches no template is an error
(-113 in the error queue of a SCPI-like dialect, an error line on a line protocol), so an
instrument without an identify command answers nothing to ``*IDN?``. The physics stays in
the inner instrument and its World.
"""

from __future__ import annotations

import logging
import re
import string
import time
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import numpy as np

from drivers.dialect import DRIVER_WORDS
from drivers.profile import Profile
from drivers.sim.scpi import Block, ScpiDevice

__all__ = ["DialectDevice", "NO_REPLY_WAIT_S"]

logger = logging.getLogger(__name__)

#: Longest real-time wait of a held completion query (real clock only), seconds.
NO_REPLY_WAIT_S = 10.0

_NUMBER = r"[-+]?(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?"
_FIELD_RX = {
    "volts": _NUMBER,
    "amps": _NUMBER,
    "ohms": _NUMBER,
    "hz": _NUMBER,
    "seconds": _NUMBER,
    "points": r"\d+",
    "ch": r"\d+",
    "function": r".+?",
}
_BASE = Profile.load("scpi1999")  # the inner instruments' own dialect
# line-protocol error numbers (the relay board's own): unknown command, bad value, refused
_LINE_CODES = {"unknown": 1, "value": 2, "refused": 3}


@dataclass(frozen=True)
class _Op:
    role: str
    name: str  # operation, or "scaling:<field>" for one scaling query
    rx: re.Pattern[str]
    fields: tuple[str, ...]
    query: bool


class DialectDevice:
    """``inner`` (a SCPI-1999 simulated instrument) behind the dialect of ``profile``.

    Has the two methods a server needs: :meth:`execute` (one line in, reply items out) and
    :meth:`push_error`. ``role`` is the profile table the instrument implements.
    """

    def __init__(self, inner: ScpiDevice, profile: Profile, role: str, clock: Any) -> None:
        profile.require_role(role)
        self.inner = inner
        self.profile = profile
        self.role = role
        self.clock = clock
        self.dialect = profile.dialect
        self.line_protocol = bool(self.dialect.link.acknowledge)
        self.armed = False  # supply: the separate output enable
        self.interlock_closed = True
        self._ops: list[_Op] = []
        for r in ("common", role):
            for op, template in profile.templates.get(r, {}).items():
                self._ops.append(self._compile(r, op, template))
        for name, q in self.dialect.scaling_queries.items():
            if isinstance(q, str):
                self._ops.append(self._compile("scope", f"scaling:{name}", q))
        self.fixed_settings()
        self._inverse = {
            name: {said.upper(): word for word, said in table.items()}
            for name, table in self.dialect.values.get(role, {}).items()
        }

    @property
    def identity(self) -> str:
        return self.inner.identity

    # -- matching -----------------------------------------------------------------------------
    def _compile(self, role: str, op: str, template: str) -> _Op:
        parts: list[str] = []
        names: list[str] = []
        for literal, fname, _spec, _conv in string.Formatter().parse(template):
            parts.append(r"\s+".join(re.escape(w) for w in literal.split(" ")))
            if fname is None:
                continue
            names.append(fname)
            parts.append(f"(?P<{fname}>{self._field_rx(role, fname)})")
        rx = re.compile(r"\s*" + "".join(parts) + r"\s*", re.IGNORECASE)
        return _Op(role, op, rx, tuple(names), "?" in template)

    def _field_rx(self, role: str, name: str) -> str:
        if name == "channels":
            cl = self.dialect.channel_list
            sep = re.escape(cl.separator) if cl.separator.strip() else r"\s+"
            return re.escape(cl.prefix) + rf"\d+(?:{sep}\d+)*" + re.escape(cl.suffix)
        if name in DRIVER_WORDS:
            table = self.dialect.values.get(role, {}).get(name, {})
            words = [table.get(w, w) for w in DRIVER_WORDS[name]]
            return "|".join(re.escape(w) for w in sorted(words, key=len, reverse=True))
        return _FIELD_RX.get(name, r"\S+")

    def _values(self, op: _Op, m: re.Match[str]) -> dict[str, object]:
        out: dict[str, object] = {}
        for name in op.fields:
            raw = m.group(name)
            if name == "channels":
                cl = self.dialect.channel_list
                inner = raw[len(cl.prefix) : len(raw) - len(cl.suffix) or None]
                chans = [int(c) for c in re.split(r"[^\d]+", inner) if c]
                out[name] = "(@" + ",".join(str(c) for c in chans) + ")"
            elif name in DRIVER_WORDS:
                out[name] = self._inverse.get(name, {}).get(raw.upper(), raw)
            elif name in ("ch", "points"):
                out[name] = int(raw)
            elif name == "function":
                out[name] = raw
            else:
                out[name] = float(raw)
        return out

    # -- the server's interface ---------------------------------------------------------------
    def push_error(self, code: int, info: str = "") -> None:
        """Queue an error in the inner instrument (server faults, bad input)."""
        self.inner.push_error(code, info)

    def execute(self, message: bytes | str, unit_filter: Any = None) -> list:
        """One line of the dialect in; the reply items (none, or one) out."""
        text = message.decode("latin-1") if isinstance(message, bytes | bytearray) else message
        text = text.strip()
        if not text:
            return []
        with self.inner.lock:
            for op in self._ops:
                m = op.rx.fullmatch(text)
                if m is not None:
                    return self._run(op, self._values(op, m), unit_filter)
            logger.debug("%s: unknown line %r", self.identity, text[:40])
            if self.line_protocol:
                return [self._error_line("unknown", "unknown command")]
            self.inner.push_error(-113, text[:30])
            return []

    # -- running one operation ------------------------------------------------------------------
    def _inner(self, command: str, unit_filter: Any = None) -> list:
        return self.inner.execute(command, unit_filter)

    def _run(self, op: _Op, values: dict[str, object], unit_filter: Any) -> list:
        special: dict[str, Callable[[dict[str, object]], list]] = {
            "operation_complete": self._opc,
            "enable_output": lambda v: self._arm(True),
            "disable_output": lambda v: self._arm(False),
            "get_interlock": lambda v: ["CLOSED" if self.interlock_closed else "OPEN"],
            "output_on": self._output_on,
        }
        if op.name.startswith("scaling:"):
            return self._scaling_one(op.name.split(":", 1)[1], values)
        if op.name in special and op.name in self.profile.templates.get(op.role, {}):
            if op.name != "output_on" or self.profile.has_operation("supply", "enable_output"):
                return self._finish(op, special[op.name](values))
        command = _BASE.command(op.role, op.name, **values)
        items = self._inner(command, unit_filter)
        if op.name == "reset":
            self.fixed_settings()
        return self._finish(op, self._shape(op, values, items))

    def _finish(self, op: _Op, items: list) -> list:
        """On a line protocol every line is answered: the reply, OK, or an error line."""
        if not self.line_protocol:
            return items
        errors = self._inner_errors()
        if errors:
            code, message = errors[0]
            kind = "unknown" if -200 < code <= -100 else "refused" if code <= -200 else "value"
            return [self._error_line(kind, message)]
        return items or [self.dialect.link.acknowledge]

    def _inner_errors(self) -> list[tuple[int, str]]:
        found = []
        while True:
            reply = self.inner.execute("SYSTem:ERRor:NEXT?")
            code_text, _, message = str(reply[0]).partition(",")
            if int(code_text) == 0:
                return found
            found.append((int(code_text), message.strip('"')))

    def _error_line(self, kind: str, message: str) -> str:
        # the board's own format, matching the profile's error_reply (ERR <number> <text>)
        return f"ERR {_LINE_CODES[kind]} {message.split(';')[0]}"

    def _shape(self, op: _Op, values: dict[str, object], items: list) -> list:
        """Put an inner SCPI-1999 reply into the dialect's shape."""
        if not items:
            return items
        reply = items[0]
        if op.name == "scaling":
            parts = str(reply).split(",")
            inner_pos = _BASE.scaling_fields
            width = max(self.profile.scaling_fields.values()) + 1
            out = ["0"] * width
            for name, pos in self.profile.scaling_fields.items():
                out[pos] = parts[inner_pos[name]]
            return [",".join(out)]
        if op.name == "fetch" and isinstance(reply, Block):
            bits = int(getattr(self.inner, "bits", 8))
            swapped = bool(getattr(self.inner, "swapped", False))
            dtype = np.dtype(f"i{bits // 8}").newbyteorder("<" if swapped else ">")
            codes = np.frombuffer(reply.payload, dtype=dtype)
            if self.dialect.transfer.encoding == "ascii":
                return [",".join(map(str, codes.tolist()))]
            return [reply]
        if op.name == "get_condition":
            cond = int(reply)
            k = self.dialect.completion
            moved = (1 << k.waiting_bit if cond & 32 else 0) | (
                1 << k.acquiring_bit if cond & 8 else 0
            )
            return [str(moved)]
        if op.name == "get_closed":
            rb = self.dialect.readback
            words = [rb.closed if w.strip() == "1" else rb.open for w in str(reply).split(",")]
            return [rb.separator.join(words)]
        if op.name == "get_output" and self.profile.format == 2:
            return ["ON" if str(reply).strip() == "1" else "OFF"]
        return items

    def _scaling_one(self, name: str, values: dict[str, object]) -> list:
        reply = self._inner(f"TRACe:SCALing? INTernal{values['ch']}")
        if not reply:
            return []  # no record: the inner instrument queued the error
        return [str(reply[0]).split(",")[_BASE.scaling_fields[name]]]

    def fixed_settings(self) -> None:
        """What the dialect fixes rather than sets (at power-on and after *RST): a scope
        without a byte-order command sends its fixed order; a supply output is disarmed."""
        self.armed = False
        if self.role == "scope" and not self.profile.has_operation("scope", "set_byte_order"):
            order = "SWAPped" if self.dialect.transfer.byte_order == "little" else "NORMal"
            self._inner(f"FORMat:BORDer {order}")

    def _opc(self, values: dict[str, object]) -> list:
        """The completion query: '1' once no acquisition is pending; while one is, the reply
        is held (real clock, up to NO_REPLY_WAIT_S) or not given at all (a virtual clock
        cannot move while the instrument waits, so the client times out and asks again)."""
        virtual = getattr(self.clock, "virtual", False)
        deadline = time.monotonic() + (0.0 if virtual else NO_REPLY_WAIT_S)
        while True:
            if self.inner.operation_condition() == 0:
                return ["1"]
            if time.monotonic() >= deadline:
                return []
            time.sleep(0.002)

    def _arm(self, on: bool) -> list:
        self.armed = on
        if not on:
            self._inner(_BASE.command("supply", "output_off"))
        return []

    def _output_on(self, values: dict[str, object]) -> list:
        if not self.armed:
            self.inner.push_error(-221, "output not armed")
            return []
        return self._inner(_BASE.command("supply", "output_on"))
