"""Bench files (TOML): parse, validate, resolve. No instrument I/O.

A *bench file* says what hardware is where (instruments, relay channels, parts, loads,
senses, limits, or a simulated bench); what to test on it is a sequence file
(:mod:`rig.planning.sequence`). The file is checked completely before any instrument is touched. Every
problem becomes one :class:`rigbase.errors.FileFormatError` naming the file, the dotted key
(``loads[1].ohms``), the line where that key stands, and the problem; unknown keys are refused
with the nearest valid name.

Numbers are plain SI values in keys whose names carry the unit (``_s``, ``_ohms``, ``_volts``,
``_amps``, ``_hz``, ``_henry``, ``_c``). Where a number is expected a string with an SI prefix
is accepted too: ``"100k"``, ``"200n"``, ``"1.5e3"``, ``"2.2 uH"`` (see :func:`parse_si`).
"""

from __future__ import annotations

import logging
import tomllib
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import drivers
from rig.planning.calibration import Calibration, read_calibration
from rigbase.loadfile import read_load
from rigbase.tomlcheck import (
    REQUIRED,
    Context,
    Table,
    jsonable,
    parse_si,
    read_toml,
    resolve_file,
)

__all__ = [
    "PROFILES_DIR",
    "ROLES",
    "SIM_METERS_DIR",
    "Bench",
    "DEFAULT_DIVIDER_OHMS",
    "Channels",
    "InstrumentSpec",
    "Limits",
    "Load",
    "Sense",
    "Simulation",
    "read_bench_file",
    "netlist_modes",
    "parse_si",
    "resolve_meter_model",
]

log = logging.getLogger(__name__)

PROFILES_DIR = Path(drivers.__file__).resolve().parent / "profiles"
SIM_METERS_DIR = Path(drivers.__file__).resolve().parent / "sim" / "meters"

ROLES = ("supply", "switch", "scope", "meter")


def resolve_meter_model(value: str | Path, base_dir: str | Path | None = None) -> Path:
    """Path of a simulated meter's netlist: a bare id (``"demo-a"``) is
    ``drivers/sim/meters/demo-a.toml``; anything else is a path (relative to ``base_dir``,
    default the working directory). FileFormatError if the file does not exist."""
    text = str(value)
    base = Path(base_dir) if base_dir is not None else Path.cwd()
    ctx = Context(Path(text), "")
    holder = Table(ctx, {"sim_model": text}, (), ("sim_model",))
    return resolve_file(holder, "sim_model", text, base, SIM_METERS_DIR, "meter netlist")


def netlist_modes(path: str | Path) -> tuple[str, ...]:
    """Mode names listed in a meter netlist TOML (read directly, no circuit built).

    Accepts a top-level ``modes`` (list of names, list of tables with ``name``, or a table
    keyed by mode name), or the same under a ``[meter]`` or ``[model]`` table. Raises
    FileFormatError when the file is missing, not TOML, or lists no modes.
    """
    ctx, data = read_toml(path, "meter netlist")
    candidates = [data] + [data[k] for k in ("meter", "model") if isinstance(data.get(k), dict)]
    for table in candidates:
        modes = table.get("modes")
        if isinstance(modes, dict) and modes:
            return tuple(str(k) for k in modes)
        if isinstance(modes, list) and modes:
            if all(isinstance(m, str) for m in modes):
                return tuple(modes)
            if all(isinstance(m, dict) and isinstance(m.get("name"), str) for m in modes):
                return tuple(m["name"] for m in modes)
    raise ctx.error(("modes",), "meter netlist lists no modes")


@dataclass(frozen=True)
class Load:
    """A defined discharge load: resistance with the inductance of its wiring."""

    name: str
    ohms: float
    henry: float = 0.0
    channel: int | None = None  # relay that selects this load, None if always in circuit
    file: Path | None = None  # load file (diodes...) after ohms and henry, resolved


@dataclass(frozen=True)
class Sense:
    """Current sense on scope input 1: a series shunt, or a probe with its own bandwidth."""

    kind: str = "shunt"  # "shunt" | "probe"
    ohms: float = 0.1  # shunt resistance (kind = "shunt"), ohm
    amps_per_volt: float = 1.0  # probe transfer (kind = "probe"): volts at scope = amps / this
    bandwidth_hz: float | None = None  # probe bandwidth (first order); None = ideal


# Input resistance of the HV divider probe when the bench file does not give one, ohm
# (a typical high-voltage probe; common practice, no source).
DEFAULT_DIVIDER_OHMS = 100.0e6


@dataclass(frozen=True)
class InstrumentSpec:
    """One instrument role of the bench: where it is and how it is spoken to."""

    role: str  # "supply" | "switch" | "scope" | "meter"
    resource: str | None  # VISA resource string, "sim", or None (manual meter only)
    profile: Path  # command-dialect profile file (resolved)
    timeout_s: float = 5.0  # per-exchange I/O timeout, s
    control: str = "scpi"  # "scpi" | "manual" (meter only: the operator turns the dial)


@dataclass(frozen=True)
class Channels:
    """Relay channels of the three bench paths (distinct from each other and from loads)."""

    charge: int
    discharge: int
    bleed: int


@dataclass(frozen=True)
class Limits:
    """Safety limits, enforced before any command is sent."""

    max_volts: float  # highest charge voltage the bench may ever program, V
    current_limit_amps: float  # supply current limit programmed for every charge, A
    # Default residual after bleeding: 1 V, well below any touch-hazard threshold
    # (common practice, no source).
    safe_residual_volts: float = 1.0
    # Hazardous-live threshold 60 V d.c.: IEC 61010-1 earlier editions (edition 3, 2010, uses
    # 70 V d.c.), normal condition. Above it, real hardware asks for confirmation.
    hazardous_live_volts: float = 60.0
    # Stored-charge limit 45 uC (voltages up to 15 kV): IEC 61010-1 (normal condition).
    stored_charge_limit_c: float = 45e-6


@dataclass(frozen=True)
class Simulation:
    """The bench file's ``[simulation]`` table. Only the simulator knows its keys: the bench
    opener (:func:`rig.runner.opener.load_bench`) has it read there and fills ``clock`` and
    ``world``; a bench read by :func:`read_bench_file` alone carries the table unread."""

    table: Table
    base_dir: Path
    clock: str | None = None  # "virtual" | "real", once read
    world: Any = None  # the simulator's WorldConfig, once read
    dialects: Any = None  # role -> profile path each simulated instrument speaks, once read


@dataclass(frozen=True)
class Bench:
    """A validated bench file."""

    path: Path
    name: str
    instruments: dict[str, InstrumentSpec]
    channels: Channels
    charge_ohms: float
    bleed_ohms: float
    loads: tuple[Load, ...]
    sense: Sense
    divider_ratio: float | None
    divider_ohms: float
    limits: Limits
    simulation: Simulation | None
    raw: dict[str, Any]
    calibration: Calibration = Calibration()  # shunt/probe, divider and deskew records

    @property
    def uses_simulation(self) -> bool:
        """True when every instrument resource is ``"sim"`` (the loader refuses a mix)."""
        resources = [s.resource for s in self.instruments.values() if s.resource is not None]
        return bool(resources) and all(r == "sim" for r in resources)

    def load(self, name: str) -> Load:
        """The load called ``name`` (KeyError if the bench has none)."""
        for spec in self.loads:
            if spec.name == name:
                return spec
        raise KeyError(name)


_BENCH_TOP = (
    "bench",
    "instruments",
    "channels",
    "parts",
    "loads",
    "sense",
    "limits",
    "simulation",
    "calibration",
)


def _profile_channel_range(profile: Path) -> tuple[int, int] | None:
    try:
        data = tomllib.loads(profile.read_text(encoding="utf-8"))
        low, high = data["switch"]["ranges"]["channel"]
        return int(low), int(high)
    except (OSError, tomllib.TOMLDecodeError, KeyError, TypeError, ValueError):
        return None


def _read_instruments(top: Table, base_dir: Path) -> dict[str, InstrumentSpec]:
    table = top.table("instruments", ROLES, required=True)
    out: dict[str, InstrumentSpec] = {}
    for role in ROLES:
        allowed = ("resource", "profile", "timeout_s") + (("control",) if role == "meter" else ())
        if role != "meter" and not table.has(role):
            raise table.error(role, f"missing required table [instruments.{role}]")
        sub = table.table(role, allowed)
        control = sub.string(
            "control", "manual" if role == "meter" else "scpi", choices=("scpi", "manual")
        )
        resource = sub.string("resource", None if control == "manual" else REQUIRED)
        if resource is not None and resource != "sim":
            _check_resource(sub, resource)
        profile = resolve_file(
            sub, "profile", sub.string("profile", "scpi1999"), base_dir, PROFILES_DIR, "profile"
        )
        timeout = sub.number("timeout_s", 5.0, positive=True)
        out[role] = InstrumentSpec(role, resource, profile, timeout, control)
    used = {role: s.resource for role, s in out.items() if s.resource is not None}
    if len({r == "sim" for r in used.values()}) > 1:
        sim_roles = [r for r, res in used.items() if res == "sim"]
        real_roles = [r for r, res in used.items() if res != "sim"]
        raise table.error(
            (real_roles[0], "resource"),
            f"mixes simulated ({', '.join(sim_roles)}) and real ({', '.join(real_roles)}) "
            "resources; use 'sim' for all or for none",
        )
    return out


def _check_resource(table: Table, resource: str) -> None:
    # pyvisa's own resource-name parser is the reference for what VISA accepts.
    from pyvisa import rname

    try:
        rname.parse_resource_name(resource)
    except rname.InvalidResourceName as exc:
        raise table.error(
            "resource",
            f"{resource!r} is not 'sim' nor a VISA resource string such as "
            f"'TCPIP0::host::5025::SOCKET' ({exc})",
        ) from None


def _read_channels(top: Table, switch_profile: Path) -> Channels:
    table = top.table("channels", ("charge", "discharge", "bleed"), required=True)
    span = _profile_channel_range(switch_profile)
    low, high = span if span else (1, None)
    values = {
        name: table.integer(name, minimum=low, maximum=high)
        for name in ("charge", "discharge", "bleed")
    }
    seen: dict[int, str] = {}
    for name, ch in values.items():
        if ch in seen:
            raise table.error(
                name, f"channel {ch} is already used by channels.{seen[ch]}; channels must differ"
            )
        seen[ch] = name
    return Channels(**values)


def _read_loads(
    top: Table, channels: Channels, switch_profile: Path, base_dir: Path
) -> tuple[Load, ...]:
    span = _profile_channel_range(switch_profile)
    low, high = span if span else (1, None)
    used = {
        channels.charge: "channels.charge",
        channels.discharge: "channels.discharge",
        channels.bleed: "channels.bleed",
    }
    loads: list[Load] = []
    keys = ("name", "ohms", "henry", "channel", "file")
    for i, t in enumerate(top.tables("loads", keys, required=True)):
        name = t.string("name")
        if not name.strip():
            raise t.error("name", "load name is empty")
        if any(spec.name == name for spec in loads):
            raise t.error("name", f"load {name!r} is defined twice")
        ohms = t.number("ohms", positive=True)
        henry = t.number("henry", 0.0, minimum=0.0)
        channel = t.integer("channel", None, minimum=low, maximum=high)
        if channel is not None:
            if channel in used:
                raise t.error(
                    "channel",
                    f"channel {channel} is already used by {used[channel]}; channels must differ",
                )
            used[channel] = f"loads[{i}].channel"
        file = None
        if t.has("file"):
            file = base_dir / t.string("file")
            read_load(file)  # a load file's own problems name that file
        loads.append(Load(name, ohms, henry, channel, file))
    return tuple(loads)


def _read_sense(top: Table) -> tuple[Sense, float | None, float]:
    sense = top.table("sense", ("current", "voltage"), required=True)
    cur = sense.table("current", ("kind", "ohms", "amps_per_volt", "bandwidth_hz"), required=True)
    kind = cur.string("kind", "shunt", choices=("shunt", "probe"))
    defaults = Sense()
    ohms = cur.number("ohms", REQUIRED if kind == "shunt" else defaults.ohms, positive=True)
    apv = cur.number(
        "amps_per_volt", REQUIRED if kind == "probe" else defaults.amps_per_volt, positive=True
    )
    bandwidth = _optional_bandwidth(cur, "bandwidth_hz")
    volt = sense.table("voltage", ("divider_ratio", "divider_ohms"))
    ratio = volt.number("divider_ratio", None, minimum=1.0)
    divider_ohms = volt.number("divider_ohms", DEFAULT_DIVIDER_OHMS, positive=True)
    return Sense(kind, ohms, apv, bandwidth), ratio, divider_ohms


def _optional_bandwidth(table: Table, name: str) -> float | None:
    """A bandwidth in Hz, or None for ``"full"`` / absent (no limit)."""
    if table.data.get(name) in ("full", "none"):
        return None
    return table.number(name, None, positive=True)


def _read_limits(top: Table) -> Limits:
    t = top.table(
        "limits",
        (
            "max_volts",
            "current_limit_amps",
            "safe_residual_volts",
            "hazardous_live_volts",
            "stored_charge_limit_c",
        ),
        required=True,
    )
    max_volts = t.number("max_volts", positive=True)
    defaults = Limits(max_volts, 1.0)
    return Limits(
        max_volts=max_volts,
        current_limit_amps=t.number("current_limit_amps", positive=True),
        safe_residual_volts=t.number(
            "safe_residual_volts",
            defaults.safe_residual_volts,
            positive=True,
            maximum=max_volts,
            maximum_why="limits.max_volts",
        ),
        hazardous_live_volts=t.number(
            "hazardous_live_volts", defaults.hazardous_live_volts, positive=True
        ),
        stored_charge_limit_c=t.number(
            "stored_charge_limit_c", defaults.stored_charge_limit_c, positive=True
        ),
    )


def read_bench_file(path: str | Path) -> Bench:
    """Read and validate a bench file, leaving its ``[simulation]`` table unread.

    Commands load benches through :func:`rig.runner.opener.load_bench`, which also has the
    simulator read its table; FileFormatError names the file, key, line and problem."""
    path = Path(path)
    ctx, data = read_toml(path, "bench")
    base_dir = path.resolve().parent
    top = Table(ctx, data, (), _BENCH_TOP)
    name = top.table("bench", ("name",), required=True).string("name")
    instruments = _read_instruments(top, base_dir)
    switch_profile = instruments["switch"].profile
    channels = _read_channels(top, switch_profile)
    parts = top.table("parts", ("charge_ohms", "bleed_ohms"), required=True)
    partial: dict[str, Any] = {
        "channels": channels,
        "charge_ohms": parts.number("charge_ohms", positive=True),
        "bleed_ohms": parts.number("bleed_ohms", positive=True),
        "loads": _read_loads(top, channels, switch_profile, base_dir),
    }
    partial["sense"], partial["divider_ratio"], partial["divider_ohms"] = _read_sense(top)
    calibration = read_calibration(top)
    if calibration.divider_ratio is not None:
        if partial["divider_ratio"] is None:
            raise top.error(
                ("calibration", "voltage"),
                "a divider calibration, but [sense.voltage] has no divider",
            )
        partial["divider_ratio"] = calibration.divider_ratio  # the measured ratio is the one used
    limits = _read_limits(top)
    resources = [s.resource for s in instruments.values() if s.resource is not None]
    simulated = all(r == "sim" for r in resources)
    simulation = None
    if simulated:
        # Read by the simulator itself, through the bench opener (rig.runner.opener.load_bench).
        simulation = Simulation(top.table("simulation", None), base_dir)
    elif top.has("simulation"):
        raise top.error("simulation", "[simulation] needs every instrument resource = 'sim'")
    fields_ = {
        "path": path,
        "name": name,
        "instruments": instruments,
        **partial,
        "limits": limits,
        "simulation": simulation,
        "calibration": calibration,
    }
    raw = jsonable({**fields_, "simulation": None})
    if simulation is not None:
        raw["simulation"] = jsonable(simulation.table.data)
    bench = Bench(**fields_, raw=raw)
    log.debug("bench %s loaded (%s)", path, "simulated" if simulated else "real")
    return bench
