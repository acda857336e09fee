"""Netlist files (TOML) for the input networks of meters under test.

A netlist names the meter model, its rating, its modes, the two terminal nodes and the linear
elements between them. Switches are the meter's own range/function contacts: each one is
closed in the modes listed in ``closed_in`` and open (absent) in all others.

File layout (format 1)::

    [meter]
    format = 1
    model = "Candidate A"          # free text
    rating = "CAT III 1000 V"              # free text
    modes = ["AC V", "AC mV", "DC V"]      # first one is the mode after connection
    input = "VIN"                          # V input terminal node
    common = "COM"                         # COM terminal node (the bench ground)

    [[element]]
    name = "R_ptc"                         # unique
    kind = "R"                             # R | C | L | S
    nodes = ["VIN", "b"]
    ohms = 1.2e3                           # R: ohms; C: farads (+ optional rated_volts);
                                           # L: henry; S: closed_in (+ optional ohms)

Every error is a :class:`rigbase.errors.FileFormatError` naming the file, the key
(``element.<name>.<field>`` or ``meter.<field>``) and the problem, on one line.
"""

from __future__ import annotations

import logging
import math
import tomllib
from collections.abc import Iterable, Mapping
from dataclasses import dataclass, field
from pathlib import Path

from rigbase.errors import FileFormatError
from rigbase.tomlcheck import BOM_TEXT

__all__ = ["Element", "MeterNetlist", "load_netlist", "meter_models_dir", "parse_netlist"]

log = logging.getLogger(__name__)

#: Closed resistance of a meter's internal switch contact when the file gives none (ohms).
DEFAULT_SWITCH_OHMS = 0.1

_VALUE_KEY = {"R": "ohms", "C": "farads", "L": "henry", "S": "ohms"}
_ALLOWED = {
    "R": {"name", "kind", "nodes", "ohms"},
    "C": {"name", "kind", "nodes", "farads", "rated_volts"},
    "L": {"name", "kind", "nodes", "henry"},
    "S": {"name", "kind", "nodes", "ohms", "closed_in"},
}


@dataclass(frozen=True)
class Element:
    """One two-terminal linear element.

    ``kind`` is ``"R"`` (value in ohms), ``"C"`` (farads), ``"L"`` (henry), ``"S"`` (a switch:
    value is its closed resistance in ohms; open means absent) or ``"I"`` (a current source
    whose amperes come from the simulation inputs under the element's name; current flows
    from ``a`` through the source to ``b``, i.e. it is injected into node ``b``).
    ``rated_volts`` is informative (capacitor voltage rating).
    """

    name: str
    kind: str
    a: str
    b: str
    value: float = 0.0
    rated_volts: float | None = None


@dataclass(frozen=True)
class MeterNetlist:
    """A meter model's input network as read from its netlist file."""

    path: str
    model: str
    rating: str
    modes: tuple[str, ...]
    input: str
    common: str
    elements: tuple[Element, ...]
    closed_in: Mapping[str, frozenset[str]] = field(default_factory=dict)

    def closed_switches(self, mode: str) -> frozenset[str]:
        """Names of the switches that are closed in ``mode``; unknown mode -> ValueError."""
        if mode not in self.modes:
            raise ValueError(f"{self.path}: meter {self.model!r} has no mode {mode!r}")
        return frozenset(s for s, modes in self.closed_in.items() if mode in modes)

    @property
    def switches(self) -> tuple[str, ...]:
        """Names of all switch elements."""
        return tuple(e.name for e in self.elements if e.kind == "S")

    def nodes(self) -> tuple[str, ...]:
        """All node names used by the elements (sorted)."""
        return tuple(sorted({n for e in self.elements for n in (e.a, e.b)}))


def meter_models_dir() -> Path:
    """Folder of the shipped (invented) demo meter netlists."""
    return Path(__file__).with_name("meters")


def load_netlist(path: str | Path) -> MeterNetlist:
    """Read and validate a netlist TOML file (see the module docstring)."""
    p = Path(path)
    try:
        text = p.read_text(encoding="utf-8")
    except OSError as exc:
        raise FileFormatError(p, "", f"cannot read netlist: {exc.strerror or exc}") from exc
    except UnicodeDecodeError as exc:
        raise FileFormatError(p, "", f"netlist is not UTF-8 text: {exc.reason}") from None
    if text.startswith("\ufeff"):
        raise FileFormatError(p, "", "netlist " + BOM_TEXT, line=1)
    return parse_netlist(text, p)


def parse_netlist(text: str, path: str | Path = "<netlist>") -> MeterNetlist:
    """Parse and validate netlist TOML text; ``path`` is only used in error messages."""
    try:
        doc = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        line = getattr(exc, "lineno", None)
        raise FileFormatError(path, "", f"not valid TOML: {exc}", line=line) from exc
    extra = set(doc) - {"meter", "element"}
    if extra:
        raise FileFormatError(path, sorted(extra)[0], "unknown top-level key")
    meter = doc.get("meter")
    if not isinstance(meter, dict):
        raise FileFormatError(path, "meter", "missing [meter] table")
    head = _parse_head(meter, path)
    raw = doc.get("element")
    if not isinstance(raw, list) or not raw:
        raise FileFormatError(path, "element", "needs at least one [[element]] table")
    elements: list[Element] = []
    closed_in: dict[str, frozenset[str]] = {}
    names: set[str] = set()
    for i, item in enumerate(raw):
        el, modes = _parse_element(item, i, path, head["modes"])
        if el.name in names:
            raise FileFormatError(path, f"element.{el.name}.name", "duplicate element name")
        names.add(el.name)
        elements.append(el)
        if modes is not None:
            closed_in[el.name] = modes
    used = {n for e in elements for n in (e.a, e.b)}
    for key in ("input", "common"):
        if head[key] not in used:
            raise FileFormatError(
                path, f"meter.{key}", f"node {head[key]!r} is not used by any element"
            )
    net = MeterNetlist(
        path=str(path),
        model=head["model"],
        rating=head["rating"],
        modes=head["modes"],
        input=head["input"],
        common=head["common"],
        elements=tuple(elements),
        closed_in=closed_in,
    )
    log.debug("netlist %s: %s, %s elements, modes %s", path, net.model, len(elements), net.modes)
    return net


def _parse_head(meter: dict, path: str | Path) -> dict:
    allowed = {"format", "model", "rating", "modes", "input", "common"}
    for k in meter:
        if k not in allowed:
            raise FileFormatError(path, f"meter.{k}", "unknown key")
    fmt = meter.get("format", 1)
    if fmt != 1:
        raise FileFormatError(path, "meter.format", f"unsupported format {fmt!r} (expected 1)")
    out: dict = {}
    for k in ("model", "rating", "input", "common"):
        v = meter.get(k)
        if not isinstance(v, str) or not v.strip():
            raise FileFormatError(path, f"meter.{k}", "missing or not a non-empty string")
        out[k] = v.strip()
    if out["input"] == out["common"]:
        raise FileFormatError(path, "meter.common", "input and common must be different nodes")
    modes = meter.get("modes")
    if not isinstance(modes, list) or not modes or not all(isinstance(m, str) for m in modes):
        raise FileFormatError(path, "meter.modes", "must be a non-empty list of strings")
    if len(set(modes)) != len(modes):
        raise FileFormatError(path, "meter.modes", "mode names must be unique")
    out["modes"] = tuple(modes)
    return out


def _parse_element(
    item: object, i: int, path: str | Path, modes: Iterable[str]
) -> tuple[Element, frozenset[str] | None]:
    if not isinstance(item, dict):
        raise FileFormatError(path, f"element[{i}]", "must be a table")
    name = item.get("name")
    if not isinstance(name, str) or not name.strip():
        raise FileFormatError(path, f"element[{i}].name", "missing or not a non-empty string")
    key = f"element.{name}"
    kind = item.get("kind")
    if kind not in _ALLOWED:
        raise FileFormatError(path, f"{key}.kind", f"must be one of R, C, L, S, not {kind!r}")
    for k in item:
        if k not in _ALLOWED[kind]:
            raise FileFormatError(path, f"{key}.{k}", f"unknown key for a {kind} element")
    nodes = item.get("nodes")
    if (
        not isinstance(nodes, list)
        or len(nodes) != 2
        or not all(isinstance(n, str) and n.strip() for n in nodes)
    ):
        raise FileFormatError(path, f"{key}.nodes", "must be a list of two node names")
    a, b = (n.strip() for n in nodes)
    if a == b:
        raise FileFormatError(path, f"{key}.nodes", "both ends on the same node")
    vkey = _VALUE_KEY[kind]
    if kind == "S":
        value = _positive(item.get(vkey, DEFAULT_SWITCH_OHMS), path, f"{key}.{vkey}")
        ci = item.get("closed_in")
        if not isinstance(ci, list) or not all(isinstance(m, str) for m in ci):
            raise FileFormatError(path, f"{key}.closed_in", "must be a list of mode names")
        known = set(modes)
        for m in ci:
            if m not in known:
                raise FileFormatError(path, f"{key}.closed_in", f"unknown mode {m!r}")
        closed: frozenset[str] | None = frozenset(ci)
    else:
        if vkey not in item:
            raise FileFormatError(path, f"{key}.{vkey}", "missing value")
        value = _positive(item[vkey], path, f"{key}.{vkey}")
        closed = None
    rated = None
    if "rated_volts" in item:
        rated = _positive(item["rated_volts"], path, f"{key}.rated_volts")
    return Element(name.strip(), kind, a, b, value, rated), closed


def _positive(v: object, path: str | Path, key: str) -> float:
    if isinstance(v, bool) or not isinstance(v, int | float):
        raise FileFormatError(path, key, f"must be a number, not {v!r}")
    f = float(v)
    if not math.isfinite(f) or f <= 0:
        raise FileFormatError(path, key, f"must be a positive finite number, not {v!r}")
    return f
