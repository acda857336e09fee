"""The data of a command dialect beyond its command templates (profile layout 2).

A profile's templates say *which* text performs each operation; the tables read here say
*how* the instrument talks: its line ends and serial settings (``[link]``), whether it answers
every command with an acknowledgement or an error line, the words it uses for the driver's
values (``[<role>.values]``), how it writes a channel list and answers a relay readback
(``[switch.channel_list]``, ``[switch.readback]``), how a scope transfers its codes, reports
its scaling and signals the end of an acquisition (``[scope.transfer]``,
``[scope.scaling_queries]``, ``[scope.completion]``), and which reply of a supply's interlock
query means "closed". A layout-1 profile has none of these tables and gets the defaults,
which are the generic SCPI-1999 behaviour, so old files keep working unchanged.

One key exists in both layouts: ``[common] compound = true`` says the instrument takes a
compound program message, units separated by ``;`` (IEEE 488.2-1992, 7.1), so a checked
command and its error-queue query travel as one message (``ROUT:CLOS (@4);:SYST:ERR?``). It
is off unless a profile says so: an instrument that runs only the first unit, or none, would
otherwise leave every checked command waiting for a reply that never comes.

:func:`read_dialect` validates them; :func:`check_consistency` looks for entries that
contradict each other (``rig profile-check``). Every complaint is one
:class:`~rigbase.errors.ProfileError` naming the file and the dotted key.
"""

from __future__ import annotations

import re
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from types import MappingProxyType
from typing import Any

from drivers.operations import SCALING_FIELDS
from rigbase.errors import ProfileError

__all__ = [
    "DRIVER_WORDS",
    "ChannelList",
    "Completion",
    "Dialect",
    "Link",
    "Readback",
    "Transfer",
    "compound_message",
    "read_dialect",
    "termination_name",
]

#: The words the drivers put into template fields; a ``[<role>.values]`` table maps any of
#: them to the instrument's own word (``state = { ON = "1", OFF = "0" }``).
DRIVER_WORDS: Mapping[str, tuple[str, ...]] = MappingProxyType(
    {
        "state": ("ON", "OFF"),
        "coupling": ("AC", "DC"),
        "slope": ("POSitive", "NEGative", "EITHer"),
        "fmt": ("INT,8", "INT,16"),
        "order": ("NORMal", "SWAPped"),
    }
)
_PARITIES = ("none", "even", "odd")
_FLOWS = ("none", "xon_xoff", "rts_cts")
_TERMINATIONS = {"\n": "LF", "\r\n": "CR LF", "\r": "CR", "": "none"}


@dataclass(frozen=True)
class Link:
    """How bytes travel: line ends, acknowledgements, error lines, serial settings."""

    read_termination: str = "\n"  # what ends the instrument's replies
    write_termination: str = "\n"  # what the driver appends to each command
    acknowledge: str = ""  # "" = commands get no answer; else the word that confirms one
    error_reply: str = ""  # regex with (?P<code>) and (?P<message>): an error line
    interface: str = "any"  # "any" | "serial" (the instrument has only a serial port)
    baud_rate: int = 9600  # serial only, bits per second
    data_bits: int = 8
    parity: str = "none"  # none | even | odd
    stop_bits: float = 1.0
    flow_control: str = "none"  # none | xon_xoff | rts_cts

    def error_match(self, reply: str) -> tuple[int, str] | None:
        """``(code, message)`` when ``reply`` is one of the instrument's error lines."""
        if not self.error_reply:
            return None
        m = re.fullmatch(self.error_reply, reply.strip())
        if m is None:
            return None
        return int(m.group("code")), m.group("message").strip()


@dataclass(frozen=True)
class ChannelList:
    """How a relay board writes a channel list: prefix, separator, suffix (``(@1,3)``)."""

    prefix: str = "(@"
    separator: str = ","
    suffix: str = ")"

    def text(self, channels: list[int]) -> str:
        """The instrument's text for ``channels``."""
        return self.prefix + self.separator.join(str(int(c)) for c in channels) + self.suffix


@dataclass(frozen=True)
class Readback:
    """A relay readback answer: one word per listed channel."""

    separator: str = ","
    closed: str = "1"
    open: str = "0"


@dataclass(frozen=True)
class Transfer:
    """How scope codes travel: ``block`` (IEEE 488.2 definite length) or ``ascii``
    (comma-separated integers); ``byte_order`` is the order the driver asks for, or the
    instrument's fixed order when the profile has no ``set_byte_order``."""

    encoding: str = "block"
    byte_order: str = "big"


@dataclass(frozen=True)
class Completion:
    """How the end of an acquisition is found: ``status`` (poll ``get_condition``: busy
    while ``waiting_bit`` or ``acquiring_bit`` is set), ``opc`` (``*OPC?``-style query that
    answers once the record is complete) or ``wait`` (no signal: wait ``wait_s`` seconds more
    than the record lasts, then fetch)."""

    method: str = "status"
    waiting_bit: int = 5  # SCPI-1999 STATus:OPERation: 5 waiting for trigger
    acquiring_bit: int = 3  # 3 sweeping
    wait_s: float = 0.0


@dataclass(frozen=True)
class Dialect:
    """Everything of a profile that is not a command template (defaults: SCPI-1999)."""

    link: Link = field(default_factory=Link)
    values: Mapping[str, Mapping[str, Mapping[str, str]]] = field(default_factory=dict)
    channel_list: ChannelList = field(default_factory=ChannelList)
    readback: Readback = field(default_factory=Readback)
    transfer: Transfer = field(default_factory=Transfer)
    completion: Completion = field(default_factory=Completion)
    scaling_queries: Mapping[str, str | float] = field(default_factory=dict)
    interlock_closed: str = ""  # supply: the get_interlock answer that means "closed"
    compound: bool = False  # [common] compound: "<command>;:<next_error>" as one message

    def word(self, role: str, name: str, value: object) -> object:
        """The instrument's word for driver value ``value`` of field ``name`` (or it)."""
        table = self.values.get(role, {}).get(name)
        if table is None or not isinstance(value, str):
            return value
        return table.get(value, value)


class _Reader:
    def __init__(self, path: Path) -> None:
        self.path = path

    def fail(self, key: str, problem: str) -> ProfileError:
        return ProfileError(self.path, key, problem)

    def table(self, data: Mapping[str, Any], key: str, allowed: tuple[str, ...]) -> dict:
        node = data
        for part in key.split("."):
            node = node.get(part, {}) if isinstance(node, Mapping) else {}
        if not isinstance(node, Mapping):
            raise self.fail(key, "must be a table")
        for name in node:
            if name not in allowed:
                raise self.fail(f"{key}.{name}", f"unknown key; known: {', '.join(allowed)}")
        return dict(node)

    def get(self, t: dict, key: str, name: str, kind: type | tuple, default: Any) -> Any:
        if name not in t:
            return default
        value = t[name]
        if isinstance(value, bool) and kind is not bool:
            raise self.fail(f"{key}.{name}", f"must be {_kind(kind)}, found a boolean")
        if not isinstance(value, kind):
            raise self.fail(f"{key}.{name}", f"must be {_kind(kind)}, found {value!r}")
        return value

    def choice(self, t: dict, key: str, name: str, choices: tuple[str, ...], default: str) -> str:
        value = self.get(t, key, name, str, default)
        if value not in choices:
            raise self.fail(f"{key}.{name}", f"{value!r} is not one of {', '.join(choices)}")
        return value


def _kind(kind: type | tuple) -> str:
    names = {str: "a string", int: "an integer", float: "a number", bool: "true or false"}
    if isinstance(kind, tuple):
        return " or ".join(names.get(k, k.__name__) for k in kind)
    return names.get(kind, kind.__name__)


def read_dialect(data: Mapping[str, Any], path: Path, fmt: int) -> Dialect:
    """The non-template tables of a parsed profile (layout ``fmt``); layout 1 has none."""
    r = _Reader(path)
    common = data.get("common", {})
    compound = common.get("compound", False) if isinstance(common, Mapping) else False
    if not isinstance(compound, bool):
        raise r.fail("common.compound", f"must be true or false, found {compound!r}")
    if fmt == 1:
        for key in ("link",):
            if key in data:
                raise r.fail(key, "needs [profile] format = 2")
        return Dialect(compound=compound)
    d = Link()
    t = r.table(data, "link", tuple(Link.__dataclass_fields__))
    link = Link(
        read_termination=r.get(t, "link", "read_termination", str, d.read_termination),
        write_termination=r.get(t, "link", "write_termination", str, d.write_termination),
        acknowledge=r.get(t, "link", "acknowledge", str, d.acknowledge),
        error_reply=r.get(t, "link", "error_reply", str, d.error_reply),
        interface=r.choice(t, "link", "interface", ("any", "serial"), d.interface),
        baud_rate=r.get(t, "link", "baud_rate", int, d.baud_rate),
        data_bits=r.get(t, "link", "data_bits", int, d.data_bits),
        parity=r.choice(t, "link", "parity", _PARITIES, d.parity),
        stop_bits=float(r.get(t, "link", "stop_bits", (int, float), d.stop_bits)),
        flow_control=r.choice(t, "link", "flow_control", _FLOWS, d.flow_control),
    )
    for name in ("read_termination", "write_termination"):
        if getattr(link, name) not in _TERMINATIONS:
            raise r.fail(f"link.{name}", 'must be "\\n", "\\r\\n", "\\r" or ""')
    if link.baud_rate <= 0 or link.data_bits not in (5, 6, 7, 8):
        raise r.fail("link.baud_rate", "baud_rate must be > 0 and data_bits 5 to 8")
    if link.stop_bits not in (1.0, 1.5, 2.0):
        raise r.fail("link.stop_bits", "must be 1, 1.5 or 2")
    if link.error_reply:
        try:
            rx = re.compile(link.error_reply)
        except re.error as exc:
            raise r.fail("link.error_reply", f"not a regular expression: {exc}") from None
        if not {"code", "message"} <= set(rx.groupindex):
            raise r.fail("link.error_reply", "needs the groups (?P<code>...) and (?P<message>...)")

    values: dict[str, dict[str, dict[str, str]]] = {}
    for role in ("supply", "switch", "scope", "meter"):
        vt = r.table(data, f"{role}.values", tuple(DRIVER_WORDS))
        for name, mapping in vt.items():
            key = f"{role}.values.{name}"
            if not isinstance(mapping, Mapping):
                raise r.fail(key, "must be a table: driver word -> instrument word")
            for word, said in mapping.items():
                if word not in DRIVER_WORDS[name]:
                    raise r.fail(f"{key}.{word}", f"not a driver word ({DRIVER_WORDS[name]})")
                if not isinstance(said, str) or not said.strip():
                    raise r.fail(f"{key}.{word}", "must be a non-empty string")
            if len(set(mapping.values())) != len(mapping):
                raise r.fail(key, "two driver words map to the same instrument word")
            values.setdefault(role, {})[name] = dict(mapping)

    ct = r.table(data, "switch.channel_list", ("prefix", "separator", "suffix"))
    dc = ChannelList()
    clist = ChannelList(
        *(
            r.get(ct, "switch.channel_list", k, str, getattr(dc, k))
            for k in ("prefix", "separator", "suffix")
        )
    )
    rt = r.table(data, "switch.readback", ("separator", "closed", "open"))
    dr = Readback()
    readback = Readback(
        *(
            r.get(rt, "switch.readback", k, str, getattr(dr, k))
            for k in ("separator", "closed", "open")
        )
    )
    if readback.closed == readback.open:
        raise r.fail("switch.readback.closed", "the closed and open words are the same")

    tt = r.table(data, "scope.transfer", ("encoding", "byte_order"))
    transfer = Transfer(
        encoding=r.choice(tt, "scope.transfer", "encoding", ("block", "ascii"), "block"),
        byte_order=r.choice(tt, "scope.transfer", "byte_order", ("big", "little"), "big"),
    )
    kt = r.table(data, "scope.completion", ("method", "waiting_bit", "acquiring_bit", "wait_s"))
    dk = Completion()
    completion = Completion(
        method=r.choice(kt, "scope.completion", "method", ("status", "opc", "wait"), dk.method),
        waiting_bit=r.get(kt, "scope.completion", "waiting_bit", int, dk.waiting_bit),
        acquiring_bit=r.get(kt, "scope.completion", "acquiring_bit", int, dk.acquiring_bit),
        wait_s=float(r.get(kt, "scope.completion", "wait_s", (int, float), dk.wait_s)),
    )
    for name in ("waiting_bit", "acquiring_bit"):
        if not 0 <= getattr(completion, name) <= 15:
            raise r.fail(f"scope.completion.{name}", "must be a bit number 0 to 15")
    if completion.wait_s < 0:
        raise r.fail("scope.completion.wait_s", "must be >= 0 s")

    qt = r.table(data, "scope.scaling_queries", SCALING_FIELDS)
    queries: dict[str, str | float] = {}
    for name, value in qt.items():
        key = f"scope.scaling_queries.{name}"
        if isinstance(value, bool) or not isinstance(value, str | int | float):
            raise r.fail(key, "must be a query template (string) or a fixed number")
        if isinstance(value, str):
            unknown = set(re.findall(r"{(\w*)", value)) - {"ch"}
            if unknown or not value.strip():
                raise r.fail(key, "a query template may use the field {ch} only")
        queries[name] = value if isinstance(value, str) else float(value)
    if queries and set(queries) != set(SCALING_FIELDS):
        missing = sorted(set(SCALING_FIELDS) - set(queries))
        raise r.fail("scope.scaling_queries", f"missing {', '.join(missing)}")

    supply = data.get("supply", {})
    interlock = supply.get("interlock_closed", "") if isinstance(supply, Mapping) else ""
    if not isinstance(interlock, str):
        raise r.fail("supply.interlock_closed", "must be a string (the 'closed' answer)")
    return Dialect(
        link=link,
        values=MappingProxyType(values),
        channel_list=clist,
        readback=readback,
        transfer=transfer,
        completion=completion,
        scaling_queries=MappingProxyType(queries),
        interlock_closed=interlock,
        compound=compound,
    )


def compound_message(command: str, query: str) -> str:
    """``command`` and ``query`` as one compound program message (IEEE 488.2-1992, 7.1:
    units separated by ``;``). A leading ``:`` puts the query's header back at the root, so
    the command's header path does not prefix it (SCPI-1999 Vol. 1, 6.2.4, from memory);
    a common command (``*...``) needs none: it neither uses nor moves the path."""
    sep = ";" if query.startswith(("*", ":")) else ";:"
    return f"{command}{sep}{query}"


def termination_name(text: str) -> str:
    """``"\\r\\n"`` -> ``"CR LF"`` (for messages and generated pages)."""
    return _TERMINATIONS.get(text, repr(text))
