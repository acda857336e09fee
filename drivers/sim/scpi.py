"""SCPI-1999 / IEEE 488.2 server core, independent of any instrument.

An instrument is a :class:`ScpiDevice` subclass that declares its command tree as data::

    self.add("[SOURce]:VOLTage[:LEVel][:IMMediate][:AMPLitude]", set=self._set_v, query=self._get_v)
    self.add("INPut#:COUPling", set=..., query=...)

Upper-case letters are the short form, brackets mark optional nodes, ``#`` marks a node that
takes a numeric suffix (missing suffix = 1). The device parses whole program messages (one
line without its terminator), keeps the IEEE 488.2 status registers and the SCPI error queue,
and returns the response items; :mod:`drivers.sim.server` puts them on the wire.

Parsing rules (SCPI-1999 vol. 1 ch. 6, IEEE 488.2 ch. 7; see REFERENCES.md section 5):

- short or long form in any case; any other abbreviation is -113;
- ``;`` continues in the path of the previous header, ``;:`` and a leading ``:`` start from the
  root; common commands (``*XXX``) may appear anywhere and do not move the path;
- parameters: decimal numbers with suffixes and multipliers (``1.5K``, ``200MHZ``; ``M`` is
  milli, ``MA`` mega, except ``MHZ`` megahertz and ``MOHM`` megohm), ``#H``/``#Q``/``#B``
  non-decimal numbers, ``MIN``/``MAX``/``DEF``, booleans, character data, quoted strings,
  channel lists ``(@1,3)``, ``(@1:4)``, ``(@101:105,110)``;
- after a command error (-1xx) the rest of the program message is skipped (IEEE 488.2
  6.1.6.1.1 [M]); execution errors (-2xx) do not stop the following message units.
"""

from __future__ import annotations

import logging
import re
import threading
from collections import deque
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field

from rigbase.errors import ScpiError

__all__ = [
    "Block",
    "Call",
    "CommandRejected",
    "ERROR_MESSAGES",
    "Param",
    "ScpiDevice",
    "encode_block",
    "format_number",
    "match_nodes",
    "parse_header_pattern",
    "parse_params",
    "split_units",
]

logger = logging.getLogger(__name__)

# Standard error numbers and messages. SCPI-1999 vol. 2 ch. 21 / REFERENCES.md section 5:
# -100..-113, -200, -221, -222, -350, -410, -420 [T]; -101, -104, -114, -131, -224, -230 and
# -363 are further entries of the same SCPI table, quoted from memory [M].
ERROR_MESSAGES: dict[int, str] = {
    0: "No error",
    -100: "Command error",
    -101: "Invalid character",
    -102: "Syntax error",
    -104: "Data type error",
    -108: "Parameter not allowed",
    -109: "Missing parameter",
    -113: "Undefined header",
    -114: "Header suffix out of range",
    -131: "Invalid suffix",
    -200: "Execution error",
    -221: "Settings conflict",
    -222: "Data out of range",
    -224: "Illegal parameter value",
    -230: "Data corrupt or stale",
    -350: "Queue overflow",
    -363: "Input buffer overrun",
    -410: "Query INTERRUPTED",
    -420: "Query UNTERMINATED",
}

# IEEE 488.2 Standard Event Status Register bits (488.2 11.5.1).
ESR_OPC = 1
ESR_QUERY_ERROR = 4
ESR_DEVICE_ERROR = 8
ESR_EXECUTION_ERROR = 16
ESR_COMMAND_ERROR = 32
ESR_POWER_ON = 128
# Status Byte bits: 2 error queue not empty (SCPI-1999), 4 MAV, 5 ESB, 6 MSS, 7 operation.
STB_ERROR_QUEUE = 4
STB_MAV = 16
STB_ESB = 32
STB_MSS = 64
STB_OPERATION = 128

QUEUE_DEPTH = 20
INSTRUMENT_NAME = "simulated instrument"


class CommandRejected(ScpiError):
    """A handler refuses a command: the device queues ``code`` with an optional detail."""

    def __init__(self, code: int, info: str = ""):
        self.info = info
        super().__init__(INSTRUMENT_NAME, None, code, ERROR_MESSAGES.get(code, "Error"))


@dataclass(frozen=True)
class Block:
    """A definite-length arbitrary block reply (the payload; the header is added on output)."""

    payload: bytes


def encode_block(payload: bytes, announce: int | None = None) -> bytes:
    """IEEE 488.2 definite-length block ``#<n><len><bytes>`` (488.2 7.7.6 / 8.7.9).

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


# ----------------------------------------------------------------------------------------------
# Header patterns


@dataclass(frozen=True)
class Node:
    """One mnemonic of a header pattern."""

    short: str  # upper case
    long: str  # upper case
    optional: bool
    numbered: bool

    def accepts(self, alpha: str) -> bool:
        return alpha == self.short or alpha == self.long


_PATTERN_NODE = re.compile(r"(\[)?:?([A-Za-z][A-Za-z0-9]*?)(#)?(\])?$")


def parse_header_pattern(pattern: str) -> tuple[Node, ...]:
    """Turn ``"[SOURce]:VOLTage[:LEVel]"`` into nodes (upper-case part = short form)."""
    if pattern.startswith("*"):
        return (Node(pattern.upper(), pattern.upper(), False, False),)
    nodes: list[Node] = []
    for raw in re.findall(r"\[?:?[A-Za-z][A-Za-z0-9]*#?\]?", pattern):
        m = _PATTERN_NODE.match(raw)
        if m is None:  # pragma: no cover - the findall pattern guarantees a match
            raise ValueError(f"bad header pattern {pattern!r}")
        name = m.group(2)
        short = "".join(c for c in name if c.isupper() or c.isdigit())
        nodes.append(Node(short, name.upper(), bool(m.group(1)), bool(m.group(3))))
    if not nodes:
        raise ValueError(f"empty header pattern {pattern!r}")
    return tuple(nodes)


def _split_mnemonic(token: str) -> tuple[str, int | None]:
    """``"INP2"`` -> ``("INP", 2)``; no trailing digits -> ``(token, None)``."""
    m = re.match(r"^(.*?[A-Z_])(\d+)$", token)
    if m:
        return m.group(1), int(m.group(2))
    return token, None


def match_nodes(nodes: Sequence[Node], typed: Sequence[str]) -> dict[str, int] | None:
    """Match typed mnemonics (upper case) against pattern nodes; returns the suffixes or None.

    Optional nodes may be left out; a numbered node left out or typed without a suffix
    gets suffix 1 (SCPI-1999 vol. 1 6.2.5.2).
    """

    def rec(pi: int, ti: int, suffixes: dict[str, int]) -> dict[str, int] | None:
        if ti == len(typed):
            if all(n.optional for n in nodes[pi:]):
                rest = {n.long: 1 for n in nodes[pi:] if n.numbered}
                return {**rest, **suffixes}
            return None
        if pi == len(nodes):
            return None
        node = nodes[pi]
        token = typed[ti]
        if node.numbered:
            alpha, number = _split_mnemonic(token)
            ok = node.accepts(alpha)
        else:
            number = None
            ok = node.accepts(token)
        if ok:
            taken = suffixes
            if node.numbered:
                taken = {**suffixes, node.long: 1 if number is None else number}
            found = rec(pi + 1, ti + 1, taken)
            if found is not None:
                return found
        if node.optional:
            skipped = {**suffixes, node.long: 1} if node.numbered else suffixes
            return rec(pi + 1, ti, skipped)
        return None

    return rec(0, 0, {})


# ----------------------------------------------------------------------------------------------
# Parameters

# IEEE 488.2 table 7-2 suffix multipliers; "M" is milli, "MA" mega.
_MULTIPLIERS = {
    "EX": 1e18,
    "PE": 1e15,
    "T": 1e12,
    "G": 1e9,
    "MA": 1e6,
    "K": 1e3,
    "": 1.0,
    "M": 1e-3,
    "U": 1e-6,
    "N": 1e-9,
    "P": 1e-12,
    "F": 1e-15,
    "A": 1e-18,
}
_NUMBER = re.compile(r"^([+-]?(?:\d+(?:\.\d*)?|\.\d+)(?:[eE]\s*[+-]?\d+)?)\s*([A-Za-z%/]*)$")
_NONDECIMAL = re.compile(r"^#([HhQqBb])([0-9A-Fa-f]+)$")
_CHAR = re.compile(r"^[A-Za-z][A-Za-z0-9_]*$")


@dataclass(frozen=True)
class Param:
    """One program data element. ``kind``: number, char, string or channels."""

    kind: str
    text: str
    value: float | str | tuple[int, ...] = ""
    suffix: str = ""

    # -- conversions used by handlers; each raises CommandRejected with the standard code ----

    def number(
        self,
        unit: str | None = None,
        *,
        low: float = float("-inf"),
        high: float = float("inf"),
        default: float | None = None,
        special: bool = True,
    ) -> float:
        """The value in base units; MIN/MAX/DEF give ``low``/``high``/``default``.

        Out of [low, high] -> -222; text that is not a number -> -104; bad suffix -> -131.
        """
        if self.kind == "char" and special:
            word = self.text.upper()
            if word in ("MIN", "MINIMUM") and low != float("-inf"):
                return low
            if word in ("MAX", "MAXIMUM") and high != float("inf"):
                return high
            if word in ("DEF", "DEFAULT") and default is not None:
                return default
        if self.kind != "number":
            raise CommandRejected(-104, f"number expected, got {self.text[:20]}")
        value = float(self.value) * _suffix_factor(self.suffix, unit)
        if not low <= value <= high:
            raise CommandRejected(-222, f"{format_number(value)} outside [{low:g}, {high:g}]")
        return value

    def integer(self, *, low: int, high: int, default: int | None = None) -> int:
        """An integer (488.2 rounds decimal data for integer settings)."""
        value = self.number(None, low=low, high=high, default=default)
        return int(round(value))

    def boolean(self) -> bool:
        """ON/OFF or a number (0 false, other true, after rounding per 488.2)."""
        if self.kind == "char":
            word = self.text.upper()
            if word == "ON":
                return True
            if word == "OFF":
                return False
            raise CommandRejected(-224, f"ON or OFF expected, got {self.text[:20]}")
        if self.kind == "number" and not self.suffix:
            return round(float(self.value)) != 0
        raise CommandRejected(-104, "boolean expected")

    def choice(self, *patterns: str) -> str:
        """Character data matched against mnemonic patterns, e.g. ``"POSitive"``.

        Returns the matching pattern as given; numbered patterns (``"INTernal#"``) return
        ``"INTernal<n>"``.
        """
        if self.kind != "char":
            raise CommandRejected(-104, "character data expected")
        word = self.text.upper()
        for pat in patterns:
            node = parse_header_pattern(pat)[0]
            if node.accepts(word):
                return pat.replace("#", "1")
            if node.numbered:
                alpha, number = _split_mnemonic(word)
                if number is not None and node.accepts(alpha):
                    return pat.replace("#", str(number))
        raise CommandRejected(-224, f"{self.text[:20]} not one of {'|'.join(patterns)}")

    def string(self) -> str:
        """Quoted string data (character data is accepted too)."""
        if self.kind in ("string", "char"):
            return str(self.value)
        raise CommandRejected(-104, "string expected")

    def channels(self) -> tuple[int, ...]:
        """A channel list ``(@...)`` in the order given."""
        if self.kind != "channels":
            raise CommandRejected(-104, "channel list expected")
        assert isinstance(self.value, tuple)
        return self.value


def _suffix_factor(suffix: str, unit: str | None) -> float:
    """Multiplier of a suffix such as ``"MV"``, ``"MHZ"``, ``"K"`` for a setting in ``unit``."""
    s = suffix.upper()
    if not s:
        return 1.0
    if unit is not None:
        u = unit.upper()
        # IEEE 488.2 7.7.3.5: MHZ and MOHM are mega, the only exceptions to M = milli.
        if s == "M" + u and u in ("HZ", "OHM"):
            return 1e6
        if s.endswith(u) and s[: -len(u)] in _MULTIPLIERS:
            return _MULTIPLIERS[s[: -len(u)]]
    if s in _MULTIPLIERS:
        return _MULTIPLIERS[s]
    raise CommandRejected(-131, f"suffix {suffix[:12]}")


def _parse_channel_list(text: str) -> tuple[int, ...]:
    body = text[2:-1].strip()
    if not body:
        return ()
    out: list[int] = []
    for item in body.split(","):
        item = item.strip()
        m = re.match(r"^(\d+)\s*(?::\s*(\d+))?$", item)
        if m is None:
            raise CommandRejected(-102, f"channel list item {item[:12]}")
        a = int(m.group(1))
        b = int(m.group(2)) if m.group(2) else a
        step = 1 if b >= a else -1
        if abs(b - a) > 100_000:
            raise CommandRejected(-222, "channel range too long")
        out.extend(range(a, b + step, step))
    return tuple(out)


def _parse_one(text: str) -> Param:
    t = text.strip(WHITESPACE)
    if not t:
        raise CommandRejected(-102, "empty parameter")
    if t[0] in "'\"":
        q = t[0]
        if len(t) < 2 or t[-1] != q:
            raise CommandRejected(-102, "unterminated string")
        inner = t[1:-1]
        if re.search(f"(?<!{q}){q}(?!{q})", inner.replace(q * 2, "")):
            raise CommandRejected(-102, "stray quote")
        return Param("string", t, inner.replace(q * 2, q))
    if t.startswith("(@") and t.endswith(")"):
        return Param("channels", t, _parse_channel_list(t))
    m = _NUMBER.match(t)
    if m:
        return Param("number", t, float(m.group(1).replace(" ", "")), m.group(2))
    m = _NONDECIMAL.match(t)
    if m:
        base = {"H": 16, "Q": 8, "B": 2}[m.group(1).upper()]
        try:
            return Param("number", t, float(int(m.group(2), base)))
        except ValueError as exc:
            raise CommandRejected(-102, "bad non-decimal number") from exc
    if _CHAR.match(t):
        return Param("char", t, t)
    raise CommandRejected(-102, f"bad parameter {t[:20]}")


def _split_outside(text: str, sep: str) -> list[str]:
    """Split on ``sep`` outside quotes and parentheses; raises -102 on unbalanced text."""
    parts: list[str] = []
    depth = 0
    quote = ""
    start = 0
    i = 0
    while i < len(text):
        c = text[i]
        if quote:
            if c == quote:
                if i + 1 < len(text) and text[i + 1] == quote:
                    i += 1  # doubled quote inside a string
                else:
                    quote = ""
        elif c in "'\"":
            quote = c
        elif c == "(":
            depth += 1
        elif c == ")":
            depth -= 1
            if depth < 0:
                raise CommandRejected(-102, "unbalanced parenthesis")
        elif c == sep and depth == 0:
            parts.append(text[start:i])
            start = i + 1
        i += 1
    if quote:
        raise CommandRejected(-102, "unterminated string")
    if depth:
        raise CommandRejected(-102, "unbalanced parenthesis")
    parts.append(text[start:])
    return parts


def split_units(message: str) -> list[str]:
    """Split a program message into message units at ``;`` outside strings and lists."""
    return _split_outside(message, ";")


def parse_params(text: str) -> list[Param]:
    """Parse the comma-separated program data of one message unit."""
    if not text.strip(WHITESPACE):
        return []
    return [_parse_one(p) for p in _split_outside(text, ",")]


# ----------------------------------------------------------------------------------------------
# Device

Handler = Callable[["Call"], "str | Block | None"]


@dataclass
class Command:
    """A registered header with its set and query handlers and parameter counts."""

    pattern: str
    nodes: tuple[Node, ...]
    set: Handler | None
    query: Handler | None
    set_args: tuple[int, int]
    query_args: tuple[int, int]


@dataclass
class Call:
    """What a handler receives: parameters, numeric suffixes and whether it is a query."""

    header: str
    params: list[Param]
    suffixes: dict[str, int] = field(default_factory=dict)
    query: bool = False

    def suffix(self, node: str) -> int:
        """Numeric suffix of the node named ``node`` (long form, any case); 1 if absent."""
        return self.suffixes.get(node.upper(), 1)

    def param(self, index: int) -> Param | None:
        """Parameter ``index`` or None when it was not sent (optional parameters)."""
        return self.params[index] if index < len(self.params) else None


_HEADER = re.compile(r"^:?[A-Za-z][A-Za-z0-9_]*(?::[A-Za-z][A-Za-z0-9_]*)*\??$")
_COMMON = re.compile(r"^\*[A-Za-z]+\??$")
# IEEE 488.2 7.4.1.2 [M]: white space is any byte 0x00-0x09 or 0x0B-0x20 (LF terminates)
WHITESPACE = "".join(chr(c) for c in [*range(0x00, 0x0A), *range(0x0B, 0x21)])
_INVALID_CHAR = re.compile(r"[\x7f-\xff]")
_HEADER_SPLIT = re.compile(r"^([^\x00-\x09\x0b-\x20]+)[\x00-\x09\x0b-\x20]*(.*)$", re.S)

UnitFilter = Callable[[str], "CommandRejected | None"]


class ScpiDevice:
    """SCPI-1999 / IEEE 488.2 message processing: command tree, status, error queue.

    Subclasses register their headers with :meth:`add` and override :meth:`reset`,
    :meth:`self_test` and :meth:`operation_condition`. All public methods are thread-safe
    (one lock per device: each program message runs atomically).
    """

    def __init__(self, identity: str, queue_depth: int = QUEUE_DEPTH) -> None:
        self.identity = identity
        self.queue_depth = queue_depth
        self.lock = threading.RLock()
        self._commands: list[Command] = []
        self._errors: deque[tuple[int, str]] = deque()
        self.esr = ESR_POWER_ON  # 488.2: PON is set at power-on
        self.ese = 0
        self.sre = 0
        self._oper_event = 0
        self._oper_last = 0
        self._oper_enable = 0
        self._pending_output = False
        self._add_core_commands()

    # -- registration ------------------------------------------------------------------------

    def add(
        self,
        pattern: str,
        *,
        set: Handler | None = None,  # noqa: A002 - SCPI's own word for the command form
        query: Handler | None = None,
        set_args: tuple[int, int] = (1, 1),
        query_args: tuple[int, int] = (0, 0),
    ) -> None:
        """Declare a header; ``set_args``/``query_args`` are (min, max) parameter counts."""
        if set is None and query is None:
            raise ValueError(f"{pattern}: needs a set or a query handler")
        nodes = parse_header_pattern(pattern)
        self._commands.append(Command(pattern, nodes, set, query, set_args, query_args))

    def headers(self) -> list[str]:
        """Every registered header pattern with ``?`` where a query form exists."""
        out = []
        for c in self._commands:
            if c.set is not None:
                out.append(c.pattern)
            if c.query is not None:
                out.append(c.pattern + "?")
        return out

    # -- hooks for instruments ----------------------------------------------------------------

    def reset(self) -> None:
        """*RST: instrument settings to their defaults (override)."""

    def self_test(self) -> int:
        """*TST?: 0 = passed (override)."""
        return 0

    def operation_condition(self) -> int:
        """STATus:OPERation:CONDition register value now (override)."""
        return 0

    # -- error queue and status ----------------------------------------------------------------

    def push_error(self, code: int, info: str = "") -> None:
        """Queue an error (SCPI-1999 21.8: full queue -> last entry becomes -350)."""
        with self.lock:
            if code <= -100 and code > -200:
                self.esr |= ESR_COMMAND_ERROR
            elif code <= -200 and code > -300:
                self.esr |= ESR_EXECUTION_ERROR
            elif code <= -300 and code > -400 or code > 0:
                self.esr |= ESR_DEVICE_ERROR
            elif code <= -400 and code > -500:
                self.esr |= ESR_QUERY_ERROR
            message = ERROR_MESSAGES.get(code, "Error")
            clean = re.sub(r'[^\x20-\x7e]|"', "'", info)[:60]
            text = f"{message};{clean}" if clean else message
            logger.debug("%s: error %s %s", self.identity, code, text)
            if len(self._errors) < self.queue_depth - 1:
                self._errors.append((code, text))
            elif len(self._errors) == self.queue_depth - 1:
                self._errors.append((-350, ERROR_MESSAGES[-350]))
            # queue full: further errors are lost, the -350 entry records that

    def _pop_error(self) -> str:
        if self._errors:
            code, text = self._errors.popleft()
        else:
            code, text = 0, ERROR_MESSAGES[0]
        return f'{code},"{text}"'

    def _update_operation(self) -> int:
        cond = int(self.operation_condition())
        self._oper_event |= cond & ~self._oper_last  # latch positive transitions
        self._oper_last = cond
        return cond

    def status_byte(self, pending_output: bool = False) -> int:
        """IEEE 488.2 status byte with MSS in bit 6."""
        with self.lock:
            self._update_operation()
            stb = 0
            if self._errors:
                stb |= STB_ERROR_QUEUE
            if pending_output:
                stb |= STB_MAV
            if self.esr & self.ese:
                stb |= STB_ESB
            if self._oper_event & self._oper_enable:
                stb |= STB_OPERATION
            if stb & self.sre & ~STB_MSS:
                stb |= STB_MSS
            return stb

    # -- message processing ----------------------------------------------------------------------

    def execute(self, message: bytes | str, unit_filter: UnitFilter | None = None) -> list:
        """Run one program message (no terminator); returns the response items in order.

        Items are ``str`` or :class:`Block`. Never raises for bad input: every problem ends as
        an entry in the error queue. ``unit_filter`` (server fault injection) may refuse a
        non-query, non-common command by returning a :class:`CommandRejected`.
        """
        if isinstance(message, bytes | bytearray):
            text = bytes(message).decode("latin-1")
        else:
            text = message
        with self.lock:
            responses: list = []
            if not text.strip(WHITESPACE):
                return responses
            try:
                units = split_units(text)
            except CommandRejected as exc:
                self.push_error(exc.code, exc.info)
                return responses
            path: list[str] = []
            for index, unit in enumerate(units):
                self._pending_output = bool(responses)  # MAV for *STB? inside this message
                try:
                    path = self._execute_unit(unit, path, index == 0, responses, unit_filter)
                except CommandRejected as exc:
                    self.push_error(exc.code, exc.info)
                    if -200 < exc.code <= -100:
                        break  # command error: skip the rest of the message
                except Exception as exc:  # a handler bug must not kill the server
                    logger.exception("%s: handler failed on %r", self.identity, unit)
                    self.push_error(-200, type(exc).__name__)
            return responses

    def _execute_unit(
        self,
        unit: str,
        path: list[str],
        first: bool,
        responses: list,
        unit_filter: UnitFilter | None,
    ) -> list[str]:
        if _INVALID_CHAR.search(unit):
            raise CommandRejected(-101, "byte outside 7-bit ASCII")
        stripped = unit.strip(WHITESPACE)
        if not stripped:
            raise CommandRejected(-102, "empty message unit")
        m = _HEADER_SPLIT.match(stripped)
        assert m is not None  # stripped is not empty and starts with a non-blank byte
        header, param_text = m.group(1), m.group(2)
        is_common = header.startswith("*")
        if is_common:
            if not _COMMON.match(header):
                raise CommandRejected(-102, f"header {header[:20]}")
        elif not _HEADER.match(header):
            raise CommandRejected(-102, f"header {header[:20]}")
        query = header.endswith("?")
        name = header.rstrip("?")
        if is_common:
            typed = [name.upper()]
            full = typed
            new_path = path
        else:
            rooted = name.startswith(":")
            typed = name.lstrip(":").upper().split(":")
            full = typed if (rooted or first) else [*path, *typed]
            new_path = full[:-1]
        command, suffixes = self._lookup(full)
        if command is None:
            raise CommandRejected(-113, header[:30])
        handler = command.query if query else command.set
        if handler is None:
            raise CommandRejected(-113, header[:30])
        params = parse_params(param_text)
        low, high = command.query_args if query else command.set_args
        if len(params) < low:
            raise CommandRejected(-109, header[:30])
        if len(params) > high:
            raise CommandRejected(-108, header[:30])
        if unit_filter is not None and not query and not is_common:
            refused = unit_filter(header)
            if refused is not None:
                self.push_error(refused.code, refused.info)
                return new_path
        call = Call(header, params, suffixes, query)
        result = handler(call)
        if query:
            if result is None:  # pragma: no cover - a query handler must answer
                raise CommandRejected(-200, "no answer")
            responses.append(result)
        return new_path

    def _lookup(self, typed: list[str]) -> tuple[Command | None, dict[str, int]]:
        for command in self._commands:
            suffixes = match_nodes(command.nodes, typed)
            if suffixes is not None:
                return command, suffixes
        return None, {}

    # -- IEEE 488.2 common commands and SCPI required commands -------------------------------

    def _add_core_commands(self) -> None:
        self.add("*IDN", query=lambda c: self.identity)
        self.add("*RST", set=self._rst, set_args=(0, 0))
        self.add("*CLS", set=self._cls, set_args=(0, 0))
        self.add("*OPC", set=self._opc, query=lambda c: "1", set_args=(0, 0))
        self.add("*WAI", set=lambda c: None, set_args=(0, 0))
        self.add("*ESR", query=self._esr_query)
        self.add("*ESE", set=self._ese_set, query=lambda c: str(self.ese))
        self.add("*SRE", set=self._sre_set, query=lambda c: str(self.sre))
        self.add("*STB", query=lambda c: str(self.status_byte(self._pending_output)))
        self.add("*TST", query=lambda c: str(int(self.self_test())))
        self.add("SYSTem:ERRor[:NEXT]", query=lambda c: self._pop_error())
        self.add("SYSTem:ERRor:COUNt", query=lambda c: str(len(self._errors)))
        self.add("SYSTem:VERSion", query=lambda c: "1999.0")
        self.add("STATus:OPERation:CONDition", query=lambda c: str(self._update_operation()))
        self.add("STATus:OPERation[:EVENt]", query=self._oper_event_query)
        self.add(
            "STATus:OPERation:ENABle", set=self._oper_enable_set, query=self._oper_enable_query
        )
        self.add("STATus:PRESet", set=self._status_preset, set_args=(0, 0))

    # *RST does not touch the error queue or the status registers (488.2 10.32).
    def _rst(self, call: Call) -> None:
        self.reset()

    def _cls(self, call: Call) -> None:
        self._errors.clear()
        self.esr = 0
        self._update_operation()
        self._oper_event = 0

    def _opc(self, call: Call) -> None:
        # every operation of the simulated instruments completes before the next command
        # is parsed (acquisitions are reported through STATus:OPERation instead)
        self.esr |= ESR_OPC

    def _esr_query(self, call: Call) -> str:
        value, self.esr = self.esr, 0
        return str(value)

    def _ese_set(self, call: Call) -> None:
        self.ese = call.params[0].integer(low=0, high=255)

    def _sre_set(self, call: Call) -> None:
        self.sre = call.params[0].integer(low=0, high=255) & ~STB_MSS

    def _oper_event_query(self, call: Call) -> str:
        self._update_operation()
        value, self._oper_event = self._oper_event, 0
        return str(value)

    def _oper_enable_set(self, call: Call) -> None:
        self._oper_enable = call.params[0].integer(low=0, high=32767)

    def _oper_enable_query(self, call: Call) -> str:
        return str(self._oper_enable)

    def _status_preset(self, call: Call) -> None:
        self._oper_enable = 0
