"""The simulated bench reads its own table: ``[simulation]`` of a bench file to a WorldConfig.

The controller's bench-file loader (``rig/planning/benchfile.py``) knows the bench's real
parts (relay channels, resistors, loads, senses) and hands the ``[simulation]`` table over
unread; only the simulator knows what its keys mean. The controller reaches this module
through its bench opener (``rig/runner/opener.py``), which both ``rig check`` and ``rig run``
call, so a simulated bench is validated the same way whichever command reads it.

Every problem is one :class:`rigbase.errors.FileFormatError` naming the bench file, the
dotted key (``simulation.bounce.min_s``), its line and the problem.
"""

from __future__ import annotations

from dataclasses import dataclass, field, fields
from pathlib import Path

from drivers.sim.interfaces import BenchWiring, BounceSpec, Faults, LoadSpec, SenseSpec, WorldConfig
from rigbase.tomlcheck import Table, resolve_file

__all__ = ["METERS_DIR", "SIM_KEYS", "SimulationConfig", "read_simulation"]

METERS_DIR = Path(__file__).resolve().parent / "meters"

SIM_KEYS = (
    "clock",
    "seed",
    "noise_volts",
    "supply_output_ohms",
    "supply_max_volts",
    "supply_max_amps",
    "meter_model",
    "bounce",
    "faults",
    "dialects",
)
PROFILES_DIR = Path(__file__).resolve().parents[1] / "profiles"


@dataclass(frozen=True)
class SimulationConfig:
    """The in-process simulated bench: its clock ("virtual" or "real") and its physics."""

    clock: str
    world: WorldConfig
    dialects: dict[str, Path] = field(default_factory=dict)  # role -> profile it speaks


def read_simulation(
    table: Table,
    *,
    channels: tuple[int, int, int],
    charge_ohms: float,
    bleed_ohms: float,
    loads: tuple[LoadSpec, ...],
    sense: SenseSpec,
    divider_ratio: float | None,
    divider_ohms: float,
    base_dir: Path,
) -> SimulationConfig:
    """Read the ``[simulation]`` table (``table``) around the bench's own parts.

    ``channels`` are the (charge, discharge, bleed) relay channels; the other keywords are the
    bench file's parts as already validated by the controller. ``base_dir`` resolves a
    ``meter_model`` path (a bare id such as ``"demo-a"`` names a bundled meter netlist).
    """
    t = Table(table.ctx, table.data, table.key, SIM_KEYS)  # unknown keys refused here
    d = WorldConfig(meter_model="")
    clock = t.string("clock", "virtual", choices=("virtual", "real"))
    if t.has("meter_model"):
        meter_model = resolve_file(
            t, "meter_model", t.string("meter_model"), base_dir, METERS_DIR, "meter netlist"
        )
    else:
        # The sequence's meters replace it; this is only what the world starts with.
        meter_model = METERS_DIR / "demo-a.toml"
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
    all_channels = set(channels) | {load.channel for load in loads if load.channel is not None}
    stuck = f.integers("relay_stuck_closed", df.relay_stuck_closed, minimum=1)
    for i, ch in enumerate(stuck):
        if ch not in all_channels:
            raise f.error(("relay_stuck_closed", i), f"channel {ch} is not a bench channel")
    stuck_open = f.integers("relay_stuck_open", df.relay_stuck_open, minimum=1)
    for i, ch in enumerate(stuck_open):
        if ch not in all_channels:
            raise f.error(("relay_stuck_open", i), f"channel {ch} is not a bench channel")
    faults = Faults(
        relay_stuck_closed=tuple(stuck),
        relay_stuck_open=tuple(stuck_open),
        supply_trip_amps=f.number("supply_trip_amps", None, positive=True),
        supply_stuck_on=f.boolean("supply_stuck_on", df.supply_stuck_on),
        scope_never_triggers=f.boolean("scope_never_triggers", df.scope_never_triggers),
        drop_connection_after=f.integer("drop_connection_after", None, minimum=1),
        drop_unanswered=f.boolean("drop_unanswered", df.drop_unanswered),
        slow_answer_s=f.number("slow_answer_s", df.slow_answer_s, minimum=0.0),
        scpi_error_every=f.integer("scpi_error_every", None, minimum=1),
        corrupt_block_every=f.integer("corrupt_block_every", None, minimum=1),
    )
    charge, discharge, bleed = channels
    wiring = BenchWiring(
        charge_channel=charge,
        discharge_channel=discharge,
        bleed_channel=bleed,
        supply_output_ohms=t.number(
            "supply_output_ohms", d.wiring.supply_output_ohms, positive=True
        ),
        charge_ohms=charge_ohms,
        bleed_ohms=bleed_ohms,
        loads=loads,
        sense=sense,
        divider_ratio=divider_ratio,
        divider_ohms=divider_ohms,
    )
    world = WorldConfig(
        meter_model=str(meter_model),
        wiring=wiring,
        bounce=bounce,
        supply_max_volts=t.number("supply_max_volts", d.supply_max_volts, positive=True),
        supply_max_amps=t.number("supply_max_amps", d.supply_max_amps, positive=True),
        noise_volts=t.number("noise_volts", d.noise_volts, minimum=0.0),
        seed=t.integer("seed", d.seed, minimum=0),
        faults=faults,
    )
    # [simulation.dialects]: the dialect a simulated instrument speaks when it is not the one
    # of the profile the bench names (to try a profile being written against a known one)
    dt = t.table("dialects", ("supply", "switch", "scope", "meter"))
    dialects = {
        role: resolve_file(dt, role, dt.string(role), base_dir, PROFILES_DIR, "profile")
        for role in ("supply", "switch", "scope", "meter")
        if dt.has(role)
    }
    return SimulationConfig(clock, world, dialects)
