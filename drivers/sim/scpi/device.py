"""The SCPI-1999 / IEEE 488.2 message processor every simulated instrument is built on.

An instrument is a :class:`ScpiDevice` subclass that declares its command tree as data::

    self.add("[SOURce]:VOLTage[:LEVel][:IMMediate][:AMPLitude]", set=self._set_v, query=self._get_v)
    self.add("INPut#:COUPling", set=..., query=...)

(pattern syntax in :mod:`drivers.sim.scpi.headers`). The device parses whole program
messages (one line without its terminator), keeps the IEEE 488.2 status registers and the
SCPI error queue, runs the common commands, and returns the response items;
:mod:`drivers.sim.server` puts them on the wire. Message rules:

- short or long form in any case; any other abbreviation is -113 (SCPI-1999 Vol. 1, 6.2.1);
- ``;`` continues in the path of the previous header, ``;:`` and a leading ``:`` start from
  the root; common commands (``*XXX``) may appear anywhere and do not move the path
  (SCPI-1999 Vol. 1 ch. 6; IEEE 488.2-1992, 7.6.1.2, from memory);
- after a command error (-1xx) the rest of the program message is skipped (IEEE 488.2-1992,
  6.1.6.1.1, from memory); execution errors (-2xx) do not stop the following message units;
- the error queue answers ``<code>,"<message>"`` and ``0,"No error"`` when empty, and a full
  queue's last entry becomes -350 (SCPI-1999 Vol. 2, 21.8).
"""

from __future__ import annotations

import logging
import re
import threading
from collections import deque
from collections.abc import Callable
from dataclasses import dataclass, field

from drivers.sim.scpi.codes import (
    ERROR_MESSAGES,
    ESR_COMMAND_ERROR,
    ESR_DEVICE_ERROR,
    ESR_EXECUTION_ERROR,
    ESR_OPC,
    ESR_POWER_ON,
    ESR_QUERY_ERROR,
    QUEUE_DEPTH,
    STB_ERROR_QUEUE,
    STB_ESB,
    STB_MAV,
    STB_MSS,
    STB_OPERATION,
    CommandRejected,
)
from drivers.sim.scpi.headers import Node, match_nodes, parse_header_pattern
from drivers.sim.scpi.params import WHITESPACE, Param, parse_params, split_units
from drivers.sim.scpi.responses import Block

__all__ = ["Call", "Command", "Handler", "ScpiDevice", "UnitFilter"]

logger = logging.getLogger(__name__)

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
_INVALID_CHAR = re.compile(r"[\x7f-\xff]")
# distinct typed headers a device remembers (bounded: a client may send anything)
_RESOLVED_MAX = 4096
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
        # typed header -> (command, suffixes): a bench sends the same few headers thousands
        # of times, and matching walks every registered pattern (emptied by add())
        self._resolved: dict[tuple[str, ...], tuple[Command | None, dict[str, int]]] = {}
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
        self._resolved.clear()

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
        """Queue an error (SCPI-1999 Vol. 2, 21.8: a full queue's last entry becomes -350)."""
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
        """IEEE 488.2 status byte with MSS in bit 6 (bits in :mod:`drivers.sim.scpi.codes`)."""
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
        key = tuple(typed)
        hit = self._resolved.get(key)
        if hit is None:
            hit = None, {}
            for command in self._commands:
                suffixes = match_nodes(command.nodes, typed)
                if suffixes is not None:
                    hit = command, suffixes
                    break
            if len(self._resolved) < _RESOLVED_MAX:
                self._resolved[key] = hit
        return hit[0], dict(hit[1])

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

    # *RST does not touch the error queue or the status registers (IEEE 488.2-1992, 10.32;
    # from memory).
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
