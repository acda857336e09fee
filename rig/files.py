"""Bench and sequence files (TOML): parse, validate, resolve. No instrument I/O.

A *bench file* says what hardware is where (instruments, relay channels, parts, loads,
senses, limits, or a simulated bench); a *sequence file* says what to test on it (meters,
modes, voltages, loads, repetitions, timing, scope set-up, limits for verdicts). Both are
checked completely before any instrument is touched. Every problem becomes one
:class:`drivers.errors.FileFormatError` naming the file, the dotted key (``charge.volts[2]``),
the line where that key stands, and the problem; unknown keys are refused with the nearest
valid name.

Numbers are plain SI values in keys whose names carry the unit (``_s``, ``_ohms``, ``_volts``,
``_amps``, ``_hz``, ``_henry``, ``_c``). Where a number is expected a string with an SI prefix
is accepted too: ``"100k"``, ``"200n"``, ``"1.5e3"``, ``"2.2 uH"`` (see :func:`parse_si`).
"""

from __future__ import annotations

import logging
import math
import tomllib
from dataclasses import dataclass, fields
from pathlib import Path
from typing import Any

import drivers
from drivers.errors import FileFormatError
from drivers.sim.interfaces import (
    BenchWiring,
    BounceSpec,
    Faults,
    LoadSpec,
    SenseSpec,
    WorldConfig,
)
from rig.schema import DEFAULT_CAPTURE, LIMIT_METRICS
from rig.tomlcheck import (
    _REQUIRED,
    _Context,
    _jsonable,
    _nearest,
    _read_toml,
    _resolve_file,
    _Table,
    parse_si,
)

__all__ = [
    "DEFAULT_CAPTURE",
    "METRICS",
    "PROFILES_DIR",
    "ROLES",
    "SIM_METERS_DIR",
    "STATISTICS",
    "Bench",
    "Channels",
    "InstrumentSpec",
    "Limits",
    "LimitSpec",
    "MeterSpec",
    "ScopeSettings",
    "Sequence",
    "Simulation",
    "load_bench",
    "load_sequence",
    "netlist_modes",
    "parse_si",
    "resolve_meter_model",
]

log = logging.getLogger(__name__)

PROFILES_DIR = Path(drivers.__file__).resolve().parent / "profiles"
SIM_METERS_DIR = Path(drivers.__file__).resolve().parent / "sim" / "meters"

ROLES = ("supply", "switch", "scope", "meter")
# Metric names a limit may name (rig.schema, shared with the analysis).
METRICS = LIMIT_METRICS
STATISTICS = ("utl", "max", "p99", "p95", "median", "mean")


def resolve_meter_model(value: str | Path, base_dir: str | Path | None = None) -> Path:
    """Path of a simulated meter's netlist: a bare id (``"demo-a"``) is
    ``drivers/sim/meters/demo-a.toml``; anything else is a path (relative to ``base_dir``,
    default the working directory). FileFormatError if the file does not exist."""
    text = str(value)
    base = Path(base_dir) if base_dir is not None else Path.cwd()
    ctx = _Context(Path(text), "")
    holder = _Table(ctx, {"sim_model": text}, (), ("sim_model",))
    return _resolve_file(holder, "sim_model", text, base, SIM_METERS_DIR, "meter netlist")


def netlist_modes(path: str | Path) -> tuple[str, ...]:
    """Mode names listed in a meter netlist TOML (read directly, no circuit built).

    Accepts a top-level ``modes`` (list of names, list of tables with ``name``, or a table
    keyed by mode name), or the same under a ``[meter]`` or ``[model]`` table. Raises
    FileFormatError when the file is missing, not TOML, or lists no modes.
    """
    ctx, data = _read_toml(path, "meter netlist")
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


# --------------------------------------------------------------------------------------------
# Bench files
# --------------------------------------------------------------------------------------------


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
    # 70 V d.c.); REFERENCES.md section 3 [T]. Above it, real hardware asks for confirmation.
    hazardous_live_volts: float = 60.0
    # Stored-charge limit 45 uC (voltages up to 15 kV): IEC 61010-1; REFERENCES.md section 3 [T].
    stored_charge_limit_c: float = 45e-6


@dataclass(frozen=True)
class Simulation:
    """The in-process simulated bench: its clock and the physics configuration."""

    clock: str  # "virtual" | "real"
    world: WorldConfig


@dataclass(frozen=True)
class Bench:
    """A validated bench file."""

    path: Path
    name: str
    instruments: dict[str, InstrumentSpec]
    channels: Channels
    charge_ohms: float
    bleed_ohms: float
    loads: tuple[LoadSpec, ...]
    sense: SenseSpec
    divider_ratio: float | None
    divider_ohms: float
    limits: Limits
    simulation: Simulation | None
    raw: dict[str, Any]

    @property
    def uses_simulation(self) -> bool:
        """True when every instrument resource is ``"sim"`` (the loader refuses a mix)."""
        resources = [s.resource for s in self.instruments.values() if s.resource is not None]
        return bool(resources) and all(r == "sim" for r in resources)

    def load(self, name: str) -> LoadSpec:
        """The load called ``name`` (KeyError if the bench has none)."""
        for spec in self.loads:
            if spec.name == name:
                return spec
        raise KeyError(name)

    @property
    def wiring(self) -> BenchWiring:
        """Channels, parts, loads and senses as the simulated world sees them."""
        if self.simulation is not None:
            return self.simulation.world.wiring
        return _wiring(
            supply_output_ohms=BenchWiring().supply_output_ohms,
            channels=self.channels,
            charge_ohms=self.charge_ohms,
            bleed_ohms=self.bleed_ohms,
            loads=self.loads,
            sense=self.sense,
            divider_ratio=self.divider_ratio,
            divider_ohms=self.divider_ohms,
        )


def _wiring(
    *,
    supply_output_ohms: float,
    channels: Channels,
    charge_ohms: float,
    bleed_ohms: float,
    loads: tuple[LoadSpec, ...],
    sense: SenseSpec,
    divider_ratio: float | None,
    divider_ohms: float,
) -> BenchWiring:
    return BenchWiring(
        charge_channel=channels.charge,
        discharge_channel=channels.discharge,
        bleed_channel=channels.bleed,
        supply_output_ohms=supply_output_ohms,
        charge_ohms=charge_ohms,
        bleed_ohms=bleed_ohms,
        loads=loads,
        sense=sense,
        divider_ratio=divider_ratio,
        divider_ohms=divider_ohms,
    )


_BENCH_TOP = ("bench", "instruments", "channels", "parts", "loads", "sense", "limits", "simulation")


def _profile_channel_range(profile: Path) -> tuple[int, int] | None:
    try:
        data = tomllib.loads(profile.read_text(encoding="utf-8"))
        low, high = data["switch"]["ranges"]["channel"]
        return int(low), int(high)
    except (OSError, tomllib.TOMLDecodeError, KeyError, TypeError, ValueError):
        return None


def _read_instruments(top: _Table, base_dir: Path) -> dict[str, InstrumentSpec]:
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
        resource = sub.string("resource", None if control == "manual" else _REQUIRED)
        if resource is not None and resource != "sim":
            _check_resource(sub, resource)
        profile = _resolve_file(
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


def _check_resource(table: _Table, resource: str) -> None:
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


def _read_channels(top: _Table, switch_profile: Path) -> Channels:
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


def _read_loads(top: _Table, channels: Channels, switch_profile: Path) -> tuple[LoadSpec, ...]:
    span = _profile_channel_range(switch_profile)
    low, high = span if span else (1, None)
    used = {
        channels.charge: "channels.charge",
        channels.discharge: "channels.discharge",
        channels.bleed: "channels.bleed",
    }
    loads: list[LoadSpec] = []
    for i, t in enumerate(top.tables("loads", ("name", "ohms", "henry", "channel"), required=True)):
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
        loads.append(LoadSpec(name, ohms, henry, channel))
    return tuple(loads)


def _read_sense(top: _Table) -> tuple[SenseSpec, float | None, float]:
    sense = top.table("sense", ("current", "voltage"), required=True)
    cur = sense.table("current", ("kind", "ohms", "amps_per_volt", "bandwidth_hz"), required=True)
    kind = cur.string("kind", "shunt", choices=("shunt", "probe"))
    defaults = SenseSpec()
    ohms = cur.number("ohms", _REQUIRED if kind == "shunt" else defaults.ohms, positive=True)
    apv = cur.number(
        "amps_per_volt", _REQUIRED if kind == "probe" else defaults.amps_per_volt, positive=True
    )
    bandwidth = _optional_bandwidth(cur, "bandwidth_hz")
    volt = sense.table("voltage", ("divider_ratio", "divider_ohms"))
    ratio = volt.number("divider_ratio", None, minimum=1.0)
    divider_ohms = volt.number("divider_ohms", BenchWiring().divider_ohms, positive=True)
    return SenseSpec(kind, ohms, apv, bandwidth), ratio, divider_ohms


def _optional_bandwidth(table: _Table, name: str) -> float | None:
    """A bandwidth in Hz, or None for ``"full"`` / absent (no limit)."""
    if table.data.get(name) in ("full", "none"):
        return None
    return table.number(name, None, positive=True)


def _read_limits(top: _Table) -> Limits:
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


_SIM_KEYS = (
    "clock",
    "seed",
    "noise_volts",
    "supply_output_ohms",
    "supply_max_volts",
    "supply_max_amps",
    "meter_model",
    "bounce",
    "faults",
)


def _read_simulation(top: _Table, partial: dict[str, Any], base_dir: Path) -> Simulation:
    t = top.table("simulation", _SIM_KEYS)
    d = WorldConfig(meter_model="")
    clock = t.string("clock", "virtual", choices=("virtual", "real"))
    if t.has("meter_model"):
        meter_model = _resolve_file(
            t, "meter_model", t.string("meter_model"), base_dir, SIM_METERS_DIR, "meter netlist"
        )
    else:
        # The sequence's meters replace it; this is only what the world starts with.
        meter_model = SIM_METERS_DIR / "demo-a.toml"
    b = t.table("bounce", ("max_bounces", "min_s", "max_s", "contact_ohms"))
    db = BounceSpec()
    bounce = BounceSpec(
        max_bounces=b.integer("max_bounces", db.max_bounces, minimum=0),
        min_s=b.number("min_s", db.min_s, positive=True),
        max_s=b.number("max_s", db.max_s, positive=True),
        contact_ohms=b.number("contact_ohms", db.contact_ohms, positive=True),
    )
    if bounce.max_s < bounce.min_s:
        raise b.error("max_s", f"max_s {bounce.max_s:g} s is below min_s {bounce.min_s:g} s")
    f = t.table("faults", [fl.name for fl in fields(Faults)])
    df = Faults()
    channels: Channels = partial["channels"]
    all_channels = {channels.charge, channels.discharge, channels.bleed} | {
        load.channel for load in partial["loads"] if load.channel is not None
    }
    stuck = f.integers("relay_stuck_closed", df.relay_stuck_closed, minimum=1)
    for i, ch in enumerate(stuck):
        if ch not in all_channels:
            raise f.error(("relay_stuck_closed", i), f"channel {ch} is not a bench channel")
    faults = Faults(
        relay_stuck_closed=tuple(stuck),
        supply_stuck_on=f.boolean("supply_stuck_on", df.supply_stuck_on),
        scope_never_triggers=f.boolean("scope_never_triggers", df.scope_never_triggers),
        drop_connection_after=f.integer("drop_connection_after", None, minimum=1),
        slow_answer_s=f.number("slow_answer_s", df.slow_answer_s, minimum=0.0),
        scpi_error_every=f.integer("scpi_error_every", None, minimum=1),
        corrupt_block_every=f.integer("corrupt_block_every", None, minimum=1),
    )
    world = WorldConfig(
        meter_model=str(meter_model),
        wiring=_wiring(
            supply_output_ohms=t.number(
                "supply_output_ohms", d.wiring.supply_output_ohms, positive=True
            ),
            **partial,
        ),
        bounce=bounce,
        supply_max_volts=t.number("supply_max_volts", d.supply_max_volts, positive=True),
        supply_max_amps=t.number("supply_max_amps", d.supply_max_amps, positive=True),
        noise_volts=t.number("noise_volts", d.noise_volts, minimum=0.0),
        seed=t.integer("seed", d.seed, minimum=0),
        faults=faults,
    )
    return Simulation(clock, world)


def load_bench(path: str | Path) -> Bench:
    """Read and validate a bench file; FileFormatError names the file, key, line and problem."""
    path = Path(path)
    ctx, data = _read_toml(path, "bench")
    base_dir = path.resolve().parent
    top = _Table(ctx, data, (), _BENCH_TOP)
    name = top.table("bench", ("name",), required=True).string("name")
    instruments = _read_instruments(top, base_dir)
    switch_profile = instruments["switch"].profile
    channels = _read_channels(top, switch_profile)
    parts = top.table("parts", ("charge_ohms", "bleed_ohms"), required=True)
    partial: dict[str, Any] = {
        "channels": channels,
        "charge_ohms": parts.number("charge_ohms", positive=True),
        "bleed_ohms": parts.number("bleed_ohms", positive=True),
        "loads": _read_loads(top, channels, switch_profile),
    }
    partial["sense"], partial["divider_ratio"], partial["divider_ohms"] = _read_sense(top)
    limits = _read_limits(top)
    resources = [s.resource for s in instruments.values() if s.resource is not None]
    simulated = all(r == "sim" for r in resources)
    simulation = None
    if simulated:
        simulation = _read_simulation(top, partial, base_dir)
    elif top.has("simulation"):
        raise top.error("simulation", "[simulation] needs every instrument resource = 'sim'")
    fields_ = {
        "path": path,
        "name": name,
        "instruments": instruments,
        **partial,
        "limits": limits,
        "simulation": simulation,
    }
    bench = Bench(**fields_, raw=_jsonable(fields_))
    log.debug("bench %s loaded (%s)", path, "simulated" if simulated else "real")
    return bench


# --------------------------------------------------------------------------------------------
# Sequence files
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class MeterSpec:
    """One meter under test and the modes to test it in."""

    model: str
    serial: str
    rating: str
    modes: tuple[str, ...]
    sim_model: Path | None  # netlist of its simulated stand-in (required on a simulated bench)

    @property
    def label(self) -> str:
        return f"{self.model} s/n {self.serial}"


@dataclass(frozen=True)
class ScopeSettings:
    """Scope set-up for capturing one event. Input 1 carries the current sense, input 2 the
    divider probe (when fitted)."""

    sample_interval_s: float = 1e-9
    points: int = 20_000
    trigger_offset_s: float = -2e-6  # time of the first sample from the trigger (< 0: pre-trigger)
    current_range_amps: float = 40.0  # full-scale span, peak to peak, in amperes at the sense
    current_offset_amps: float = 0.0  # value at mid-scale, A
    trigger_level_amps: float = 0.2
    trigger_slope: str = "EITHer"  # "POSitive" | "NEGative" | "EITHer"
    bits: int = 8  # 8 | 16
    bandwidth_hz: float | None = None  # None = full bandwidth
    coupling: str = "DC"  # "DC" | "AC" (input 1)
    impedance_ohms: float = 50.0  # input 1 termination
    # input 2 (divider) span, peak to peak, in volts at the meter input; when a file leaves it
    # out, load_sequence sets 2.2 x the highest charge voltage (offset 0: covers +-1.1 x V)
    voltage_range_volts: float = 2200.0
    acquisition_timeout_s: float = 2.0  # how long the runner waits for a trigger

    @property
    def record_s(self) -> float:
        """Length of one record, s."""
        return self.points * self.sample_interval_s


@dataclass(frozen=True)
class LimitSpec:
    """A limit on one metric's group statistic; None in modes/volts/loads/captures means all."""

    metric: str
    max: float
    statistic: str = "utl"
    modes: tuple[str, ...] | None = None
    volts: tuple[float, ...] | None = None
    loads: tuple[str, ...] | None = None
    captures: tuple[str, ...] | None = None

    def applies(self, mode: str, volts: float, load: str, capture: str | None = None) -> bool:
        """Whether this limit covers the group (mode, volts in V, load, capture); a limit
        restricted to some captures does not cover ``capture=None``."""
        return (
            (self.modes is None or mode in self.modes)
            and (self.volts is None or any(math.isclose(volts, v) for v in self.volts))
            and (self.loads is None or load in self.loads)
            and (self.captures is None or capture in self.captures)
        )


@dataclass(frozen=True)
class Sequence:
    """A validated sequence file, checked against the bench it will run on."""

    path: Path
    name: str
    operator_note: str
    meters: tuple[MeterSpec, ...]
    volts: tuple[float, ...]
    loads: tuple[str, ...]
    repetitions: int
    dwell_s: float
    hold_s: float
    delays_s: tuple[float, ...]
    charge_done_amps: float | None
    scope: ScopeSettings  # [scope]: the base settings of every capture
    scope_modes: dict[str, ScopeSettings]  # first capture, mode overrides applied (modes with any)
    limits: tuple[LimitSpec, ...]
    order: str  # "grouped" | "shuffled"
    shuffle_seed: int | None
    raw: dict[str, Any]
    # Named captures in file order (one "main" capture when the file names none); every event
    # of the plan is recorded once per capture.
    captures: tuple[str, ...] = (DEFAULT_CAPTURE,)
    scope_captures: dict[str, ScopeSettings] | None = None  # base + capture overrides
    # capture -> mode -> base + capture + mode overrides (only modes with overrides)
    scope_grid: dict[str, dict[str, ScopeSettings]] | None = None

    def scope_for(self, mode: str, capture: str | None = None) -> ScopeSettings:
        """Scope settings for events in ``mode`` recorded by ``capture`` (None: the first
        capture): the base settings, then the capture's overrides, then the mode's."""
        name = self.captures[0] if capture is None else capture
        if name not in self.captures:
            raise KeyError(f"sequence {self.path} has no capture {name!r}")
        grid = (self.scope_grid or {}).get(name, {})
        if mode in grid:
            return grid[mode]
        if self.scope_captures is None or name not in self.scope_captures:
            return self.scope_modes.get(mode, self.scope)
        return self.scope_captures[name]

    @property
    def modes(self) -> tuple[str, ...]:
        """Every mode of every meter, first appearance first."""
        return tuple(dict.fromkeys(m for meter in self.meters for m in meter.modes))


_SEQ_TOP = ("sequence", "meters", "charge", "discharge", "bleed", "scope", "limits")
_SCOPE_KEYS = tuple(f.name for f in fields(ScopeSettings))


def _read_meters(top: _Table, bench: Bench, base_dir: Path) -> tuple[MeterSpec, ...]:
    meters: list[MeterSpec] = []
    allowed = ("model", "serial", "rating", "modes", "sim_model")
    scpi_functions = _meter_functions(bench)
    for t in top.tables("meters", allowed, required=True):
        model = t.string("model")
        serial = t.string("serial")
        if any(m.model == model and m.serial == serial for m in meters):
            raise t.error("serial", f"meter {model!r} s/n {serial!r} is listed twice")
        modes = t.strings("modes", choices=scpi_functions, what="meter-profile mode")
        sim_model = None
        if t.has("sim_model"):
            sim_model = _resolve_file(
                t, "sim_model", t.string("sim_model"), base_dir, SIM_METERS_DIR, "meter netlist"
            )
        elif bench.uses_simulation:
            raise t.error(
                "sim_model", f"missing required key 'sim_model': bench {bench.path} is simulated"
            )
        if sim_model is not None and bench.uses_simulation:
            known = netlist_modes(sim_model)
            for i, mode in enumerate(modes):
                if mode not in known:
                    hint = _nearest(mode, known)
                    tip = f"did you mean {hint!r}?" if hint else "it has " + ", ".join(known)
                    raise t.error(
                        ("modes", i), f"mode {mode!r} is not in netlist {sim_model.name}; {tip}"
                    )
        meters.append(MeterSpec(model, serial, t.string("rating", ""), modes, sim_model))
    return tuple(meters)


def _meter_functions(bench: Bench) -> tuple[str, ...] | None:
    """Mode names a SCPI-controlled meter's profile knows (None: no restriction)."""
    spec = bench.instruments.get("meter")
    if spec is None or spec.control != "scpi":
        return None
    try:
        data = tomllib.loads(spec.profile.read_text(encoding="utf-8"))
        functions = data["meter"]["functions"]
    except (OSError, tomllib.TOMLDecodeError, KeyError, TypeError):
        return None
    return tuple(functions) if isinstance(functions, dict) else None


def _read_scope(t: _Table, base: ScopeSettings) -> ScopeSettings:
    values: dict[str, Any] = {}
    for name in _SCOPE_KEYS:
        default = getattr(base, name)
        if name == "points":
            values[name] = t.integer(name, default, minimum=2)
        elif name == "bits":
            values[name] = t.integer(name, default)
            if values[name] not in (8, 16):
                raise t.error(name, f"must be 8 or 16, got {values[name]}")
        elif name == "trigger_slope":
            values[name] = t.string(name, default, choices=("POSitive", "NEGative", "EITHer"))
        elif name == "coupling":
            values[name] = t.string(name, default, choices=("DC", "AC"))
        elif name == "bandwidth_hz":
            values[name] = _optional_bandwidth(t, name) if t.has(name) else default
        elif name in ("trigger_offset_s", "current_offset_amps", "trigger_level_amps"):
            values[name] = t.number(name, default)
        else:
            values[name] = t.number(name, default, positive=True)
    s = ScopeSettings(**values)
    if s.trigger_offset_s <= -s.record_s:
        raise t.error(
            "trigger_offset_s",
            f"pre-trigger {-s.trigger_offset_s:.4g} s is longer than the record "
            f"({s.points} points x {s.sample_interval_s:.4g} s = {s.record_s:.4g} s)",
        )
    if abs(s.trigger_level_amps - s.current_offset_amps) >= s.current_range_amps / 2:
        raise t.error(
            "trigger_level_amps",
            f"trigger level {s.trigger_level_amps:g} A lies outside the current range "
            f"({s.current_offset_amps:g} +- {s.current_range_amps / 2:g} A)",
        )
    return s


def _read_limit(
    t: _Table,
    modes: tuple[str, ...],
    volts: tuple[float, ...],
    loads: tuple[str, ...],
    captures: tuple[str, ...],
) -> LimitSpec:
    lim_volts = t.numbers("volts", None, positive=True)
    if lim_volts is not None:
        for i, v in enumerate(lim_volts):
            if not any(math.isclose(v, x) for x in volts):
                key = ("volts", i) if isinstance(t.data["volts"], list) else "volts"
                raise t.error(key, f"{v:g} V is not one of the sequence's charge.volts")
    return LimitSpec(
        metric=t.string("metric", choices=METRICS, what="metric"),
        max=t.number("max"),
        statistic=t.string("statistic", "utl", choices=STATISTICS, what="statistic"),
        modes=t.strings("modes", None, choices=modes, what="mode"),
        volts=lim_volts,
        loads=t.strings("loads", None, choices=loads, what="load"),
        captures=t.strings("captures", None, choices=captures, what="capture"),
    )


def _read_captures(
    st: _Table, base: ScopeSettings, modes: tuple[str, ...]
) -> tuple[tuple[str, ...], dict[str, ScopeSettings], dict[str, dict[str, ScopeSettings]]]:
    """Capture names, base + capture settings, and capture -> mode -> settings with the mode
    overrides on top (every combination is validated, since a mode override that fits one
    capture's record may not fit another's)."""
    raw = st.data.get("captures", {})
    tables = st.table("captures", tuple(raw) if isinstance(raw, dict) else ())
    if st.has("captures") and not tables.data:
        raise st.error("captures", "needs at least one [scope.captures.<name>] table")
    names = tuple(tables.data) or (DEFAULT_CAPTURE,)
    for name in names:
        if not name.strip() or "|" in name:
            raise tables.error(name, f"capture name {name!r} must be non-empty and without '|'")
    per_capture = {
        name: _read_scope(tables.table(name, _SCOPE_KEYS), base) if tables.data else base
        for name in names
    }
    per_mode = st.table("modes", modes)
    grid: dict[str, dict[str, ScopeSettings]] = {}
    for name in names:
        grid[name] = {}
        for mode in per_mode.data:
            try:
                grid[name][mode] = _read_scope(per_mode.table(mode, _SCOPE_KEYS), per_capture[name])
            except FileFormatError as exc:
                if len(names) == 1:
                    raise
                raise FileFormatError(
                    exc.path, exc.key, f"{exc.problem} (with capture {name!r})", exc.line
                ) from None
    return names, per_capture, grid


def load_sequence(path: str | Path, bench: Bench) -> Sequence:
    """Read and validate a sequence file against ``bench`` (voltages, loads, meter models)."""
    path = Path(path)
    ctx, data = _read_toml(path, "sequence")
    base_dir = path.resolve().parent
    top = _Table(ctx, data, (), _SEQ_TOP)
    head = top.table(
        "sequence",
        ("name", "operator_note", "repetitions", "order", "shuffle_seed"),
        required=True,
    )
    name = head.string("name")
    operator_note = head.string("operator_note", "")
    repetitions = head.integer("repetitions", minimum=1)
    order = head.string("order", "grouped", choices=("grouped", "shuffled"), what="order")
    shuffle_seed = head.integer("shuffle_seed", None, minimum=0)
    if order == "shuffled" and shuffle_seed is None:
        raise head.error("shuffle_seed", "order = 'shuffled' needs a shuffle_seed (an integer)")
    meters = _read_meters(top, bench, base_dir)
    charge = top.table("charge", ("volts", "dwell_s", "done_amps"), required=True)
    volts = charge.numbers(
        "volts",
        positive=True,
        maximum=bench.limits.max_volts,
        maximum_why=f"limits.max_volts of bench {bench.path}",
    )
    dwell_s = charge.number("dwell_s", positive=True)
    done_amps = charge.number("done_amps", None, positive=True)
    dis = top.table("discharge", ("loads", "delays_s"), required=True)
    loads = dis.strings("loads", choices=[spec.name for spec in bench.loads], what="load")
    delays = dis.numbers("delays_s", (0.0,), minimum=0.0)
    hold_s = top.table("bleed", ("hold_s",)).number("hold_s", 0.0, minimum=0.0)
    modes = tuple(dict.fromkeys(m for meter in meters for m in meter.modes))
    st = top.table("scope", _SCOPE_KEYS + ("modes", "captures"))
    scope = _read_scope(st, ScopeSettings(voltage_range_volts=2.2 * max(volts)))
    captures, scope_captures, scope_grid = _read_captures(st, scope, modes)
    scope_modes = dict(scope_grid[captures[0]])
    limits = tuple(
        _read_limit(t, modes, volts, loads, captures)
        for t in top.tables(
            "limits", ("metric", "max", "statistic", "modes", "volts", "loads", "captures")
        )
    )
    fields_ = {
        "path": path,
        "name": name,
        "operator_note": operator_note,
        "meters": meters,
        "volts": volts,
        "loads": loads,
        "repetitions": repetitions,
        "dwell_s": dwell_s,
        "hold_s": hold_s,
        "delays_s": delays,
        "charge_done_amps": done_amps,
        "scope": scope,
        "scope_modes": scope_modes,
        "limits": limits,
        "order": order,
        "shuffle_seed": shuffle_seed,
        "captures": captures,
        "scope_captures": scope_captures,
        "scope_grid": scope_grid,
    }
    return Sequence(**fields_, raw=_jsonable(fields_))
