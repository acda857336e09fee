"""Load files: the circuit a meter's probes touch next, as a small netlist (TOML).

Read by the simulated bench (a nonlinear load on the bench), by ``rig predict`` and by the
report's predicted section, so it lives in the neutral base. Example (a 3.3 V logic input)::

    [load]
    format = 1
    name = "3.3 V logic input"
    input = "IN"                  # node the meter's V lead touches
    common = "GND"                # node its COM lead touches
    initial_volts = { RAIL = 3.3 } # node voltages before contact (others 0 V)

    [[part]]
    name = "D_rail"
    kind = "D"                    # R, C, L, I (constant current) or D (diode)
    nodes = ["IN", "RAIL"]        # anode, cathode
    diode = "clamp"               # a [diode.<name>] table
    count = 1                     # identical diodes in series (an LED string)

    [diode.clamp]                 # Shockley model; either is_amps, or forward_volts at
    is_amps = 1e-14               #   forward_amps (then is_amps is solved for)
    n = 1.0
    rs_ohms = 1.0
    cjo_farads = "3p"

A plain resistance (``"10"``, ``"1k"``) is a load too: :func:`load_from_spec`.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from pathlib import Path

from rigbase.nonlinear import VT_300K, DiodeParams, Part
from rigbase.tomlcheck import Table, parse_si, read_toml

__all__ = ["BUNDLED_LOADS", "LoadModel", "load_from_spec", "read_load"]

# the demo load files that ship with the project; a bare file name is looked up here last
BUNDLED_LOADS = Path(__file__).resolve().parents[1] / "sequences" / "loads"

_KEYS = {
    "R": ("ohms",),
    "C": ("farads",),
    "L": ("henry",),
    "I": ("amps",),
    "D": ("diode", "count"),
}


@dataclass(frozen=True)
class LoadModel:
    """A load: ``parts`` between ``input`` and ``common`` (ground); ``initial_volts`` node
    voltages (V) at the instant of contact; ``path`` the file it came from (None inline)."""

    name: str
    input: str
    common: str
    parts: tuple[Part, ...]
    initial_volts: dict[str, float] = field(default_factory=dict)
    path: Path | None = None

    @property
    def linear(self) -> bool:
        """True when the load has no diode."""
        return all(p.kind != "D" for p in self.parts)

    @property
    def series_ohms(self) -> float | None:
        """Resistance (ohm) when the load is one resistor (with any series L), else None."""
        kinds = sorted(p.kind for p in self.parts)
        if kinds in (["R"], ["L", "R"]):
            return next(p.value for p in self.parts if p.kind == "R")
        return None

    def renamed(self, prefix: str, input_node: str, common_node: str) -> list[Part]:
        """The parts with every name and inner node prefixed, input and common mapped."""

        def node(n: str) -> str:
            if n == self.input:
                return input_node
            if n == self.common:
                return common_node
            return f"{prefix}{n}"

        return [
            Part(f"{prefix}{p.name}", p.kind, node(p.a), node(p.b), p.value, p.diode)
            for p in self.parts
        ]


def _diode(t: Table) -> DiodeParams:
    n = t.number("n", 1.0, positive=True)
    rs = t.number("rs_ohms", 0.0, minimum=0.0)
    cjo = t.number("cjo_farads", positive=True)
    has_is, has_vf = t.has("is_amps"), t.has("forward_volts")
    if has_is == has_vf:
        raise t.error("is_amps", "give either is_amps, or forward_volts with forward_amps")
    if has_is:
        return DiodeParams(t.number("is_amps", positive=True), n, rs, cjo)
    vf = t.number("forward_volts", positive=True)
    i_f = t.number("forward_amps", positive=True)
    vj = vf - i_f * rs
    if vj <= 0:
        raise t.error("forward_volts", f"{vf} V at {i_f} A is below the drop across rs_ohms")
    return DiodeParams(i_f / math.expm1(vj / (n * VT_300K)), n, rs, cjo)


def read_load(path: str | Path) -> LoadModel:
    """Read and check a load file; FileFormatError names the file, key and problem."""
    path = Path(path)
    ctx, data = read_toml(path, "load")
    top = Table(ctx, data, (), ("load", "part", "diode"))
    head = top.table("load", ("format", "name", "input", "common", "initial_volts"), required=True)
    if head.integer("format") != 1:
        raise head.error("format", "only format 1 is known")
    name = head.string("name")
    inp, com = head.string("input"), head.string("common")
    if inp == com:
        raise head.error("common", "must differ from input")
    init: dict[str, float] = {}
    if head.has("initial_volts"):
        iv = head.table("initial_volts", None)
        init = {k: iv.number(k) for k in iv.data}
    dtab = top.table("diode", None)
    diodes = {
        k: _diode(
            dtab.table(
                k, ("is_amps", "n", "rs_ohms", "cjo_farads", "forward_volts", "forward_amps")
            )
        )
        for k in dtab.data
    }
    parts: list[Part] = []
    rows = top.tables("part", ("name", "kind", "nodes") + sum(_KEYS.values(), ()), required=True)
    for t in rows:
        kind = t.string("kind", choices=tuple(_KEYS), what="part kind")
        pname = t.string("name")
        extra = set(t.data) - {"name", "kind", "nodes", *_KEYS[kind]}
        if extra:
            raise t.error(sorted(extra)[0], f"not a key of a {kind} part")
        nodes = t.strings("nodes")
        if len(nodes) != 2:
            raise t.error("nodes", "must name exactly two nodes")
        a, b = nodes
        if kind == "D":
            ref = t.string("diode")
            if ref not in diodes:
                raise t.error("diode", f"no [diode.{ref}] table")
            count = t.integer("count", 1, minimum=1)
            for k in range(count):
                na = a if k == 0 else f"{pname}:{k}"
                nb = b if k == count - 1 else f"{pname}:{k + 1}"
                nm = pname if count == 1 else f"{pname}#{k + 1}"
                parts.append(Part(nm, "D", na, nb, 0.0, diodes[ref]))
        else:
            key = _KEYS[kind][0]
            val = t.number(key) if kind == "I" else t.number(key, positive=True)
            parts.append(Part(pname, kind, a, b, val))
    names = [p.name for p in parts]
    if len(set(names)) != len(names):
        raise top.error("part", "part names must be unique")
    nodes = {n for p in parts for n in (p.a, p.b)}
    for n, key in ((inp, "input"), (com, "common")):
        if n not in nodes:
            raise head.error(key, f"node {n!r} is on no part")
    for n in init:
        if n not in nodes:
            raise head.error(("initial_volts", n), f"node {n!r} is on no part")
    return LoadModel(name, inp, com, tuple(parts), init, path)


def load_from_spec(spec: str, base: Path | None = None) -> LoadModel:
    """A load from a command-line or sequence string: a ``.toml`` path (relative to ``base``)
    (else a bundled one of ``BUNDLED_LOADS``) or a resistance such as ``"10"``, ``"100 ohm"``,
    ``"1k"``. FileFormatError for a bad file, ValueError for anything else."""
    if spec.endswith(".toml"):
        p = Path(spec)
        if not p.is_absolute() and base is not None:
            p = base / p
        if not p.exists() and (BUNDLED_LOADS / spec).exists():
            p = BUNDLED_LOADS / spec
        return read_load(p)
    try:
        ohms = parse_si(spec, "load_ohms")
    except ValueError as exc:
        raise ValueError(f"load {spec!r}: neither a .toml load file nor a resistance") from exc
    if ohms <= 0:
        raise ValueError(f"load {spec!r}: resistance must be positive")
    return LoadModel(
        f"{spec} ohm" if spec[-1].isdigit() else spec, "a", "0", (Part("R", "R", "a", "0", ohms),)
    )
