"""Open the instruments a bench file names, and hand the runner one bench object and a clock.

This is the one door from the controller to the simulated bench (``drivers.sim``): it loads
bench files for every command (:func:`load_bench`: the controller's checks, then the
simulator's own reading of the ``[simulation]`` table), opens them (:func:`open_bench`) and
serves them for anyone's own scripts (:func:`serve_simulated_bench`).

When the bench file asks for the simulated bench (``resource = "sim"``), the simulated
instruments are started in-process on loopback and reached through pyvisa-py exactly like
hardware: the runner cannot tell the difference. Only two things differ, both physical acts
of an operator: turning the meter's dial (manual meters) and swapping the meter under test;
on the simulated bench the simulation does them.
"""

from __future__ import annotations

import logging
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any

from drivers.clock import Clock, RealClock, VirtualClock
from drivers.metermode import ManualMeterMode, ScpiMeterMode
from drivers.profile import Profile
from drivers.scope import Scope
from drivers.session import ScpiSession
from drivers.supply import Supply
from drivers.switch import SwitchBoard
from rig.planning.benchfile import Bench, read_bench_file
from rigbase.errors import FileFormatError
from rigbase.tomlcheck import jsonable

__all__ = [
    "OpenBench",
    "check_meter_netlists",
    "load_bench",
    "meter_time_constants",
    "open_bench",
    "serve_simulated_bench",
]

log = logging.getLogger(__name__)

Prompt = Callable[[str], None]


@dataclass
class OpenBench:
    """The instruments of one bench, opened, with the clock the runner must sleep on."""

    supply: Supply
    switch: SwitchBoard
    scope: Scope
    meter: ManualMeterMode | ScpiMeterMode
    clock: Clock
    simulated: bool
    identities: dict[str, str] = field(default_factory=dict)
    sim: Any = None  # drivers.sim.bench.SimBench on the simulated bench (ground truth for tests)
    _sessions: list[ScpiSession] = field(default_factory=list)
    _operator: Prompt | None = None

    def connect_meter(self, model: str, serial: str, sim_model: Path | None) -> None:
        """Put the next meter under test on the bench (operator action; simulated: swap netlist)."""
        if self.sim is not None:
            if sim_model is None:
                raise ValueError(f"meter {model} {serial}: no sim_model for the simulated bench")
            self.sim.world.meter_connect(str(sim_model))
        elif self._operator is not None:
            self._operator(
                f"Connect meter {model} (serial {serial}) to the bench terminals, then confirm."
            )

    def io_seconds(self) -> float:
        """Wall time spent talking to the instruments so far (all sessions), seconds."""
        return sum(s.busy_s for s in self._sessions)

    def close(self) -> None:
        """Close every session, then stop the simulated bench (safe to call twice)."""
        for s in self._sessions:
            try:
                s.close()
            except Exception:  # closing is best effort; the safe state was reached before
                log.exception("closing %s", s)
        self._sessions.clear()
        if self.sim is not None:
            self.sim.close()
            self.sim = None

    def __enter__(self) -> OpenBench:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()


def load_bench(path: str | Path) -> Bench:
    """Read and validate a bench file completely, the same way for every command.

    The controller checks instruments, channels, parts, loads, senses and limits
    (:func:`rig.planning.benchfile.read_bench_file`); a simulated bench's ``[simulation]``
    table is then read by the simulator itself, which fills ``bench.simulation.clock`` and
    ``.world``. FileFormatError names the file, the key, its line and the problem.
    """
    return _resolve_simulation(read_bench_file(path))


def _resolve_simulation(bench: Bench) -> Bench:
    sim = bench.simulation
    if sim is None or sim.world is not None:
        return bench
    from drivers.sim.config import read_simulation
    from drivers.sim.interfaces import LoadSpec, SenseSpec

    cfg = read_simulation(
        sim.table,
        channels=(bench.channels.charge, bench.channels.discharge, bench.channels.bleed),
        charge_ohms=bench.charge_ohms,
        bleed_ohms=bench.bleed_ohms,
        loads=tuple(
            LoadSpec(ld.name, ld.ohms, ld.henry, ld.channel, str(ld.file) if ld.file else None)
            for ld in bench.loads
        ),
        sense=SenseSpec(
            bench.sense.kind, bench.sense.ohms, bench.sense.amps_per_volt, bench.sense.bandwidth_hz
        ),
        divider_ratio=bench.divider_ratio,
        divider_ohms=bench.divider_ohms,
        base_dir=sim.base_dir,
    )
    raw = {**bench.raw, "simulation": jsonable(cfg)}
    # each simulated instrument speaks the dialect of the profile the bench names for it,
    # unless [simulation.dialects] names another (to try a profile against a known dialect)
    dialects = {r: s.profile for r, s in bench.instruments.items() if s.control == "scpi"}
    dialects.update(cfg.dialects)
    sim = replace(sim, clock=cfg.clock, world=cfg.world, dialects=dialects)
    return replace(bench, simulation=sim, raw=raw)


def check_meter_netlists(sequence: Any) -> None:
    """Check every meter netlist the sequence names exactly as a run will read it (keys,
    units, values; dangling nodes, nodes without a DC path): the one check ``rig check`` and
    ``rig run`` share. FileFormatError names the netlist, the key and the problem."""
    from drivers.sim.meterchecks import check_netlist

    for meter in sequence.meters:
        if meter.sim_model is not None:
            check_netlist(meter.sim_model)


def meter_time_constants(bench: Bench, sequence: Any) -> dict[tuple[int, str], float]:
    """Slowest discharge time constant (s) per (meter index, mode), from each meter's netlist
    on the simulated bench (the longest over the sequence's loads); empty on real hardware,
    where no netlist describes the meter."""
    bench = _resolve_simulation(bench)
    if bench.simulation is None or bench.simulation.world is None:
        return {}
    from drivers.sim.meterchecks import discharge_time_constants

    out: dict[tuple[int, str], float] = {}
    for k, meter in enumerate(sequence.meters):
        if meter.sim_model is None:
            continue
        for load in sequence.loads:
            taus = discharge_time_constants(bench.simulation.world, meter.sim_model, load)
            for mode in meter.modes:
                tau = taus.get(mode, float("nan"))
                out[(k, mode)] = max(out.get((k, mode), 0.0), tau)
    return out


@contextmanager
def serve_simulated_bench(
    bench: Bench, meter_model: Path | None = None, port_base: int | None = None
) -> Iterator[Any]:
    """The simulated bench of a bench file on loopback, in real time (``rig sim serve``).

    Yields the running bench: ``.resources`` maps each role to its VISA resource string and
    ``.world`` holds the physics. ``meter_model`` (a netlist path) replaces the file's meter;
    ``port_base`` fixes the TCP ports (base + 0, 1, 2, 3 for supply, switch, scope, meter).
    """
    bench = _resolve_simulation(bench)
    if bench.simulation is None:
        raise FileFormatError(bench.path, "simulation", "this bench file has no [simulation] table")
    from drivers.sim.bench import start_sim_bench

    cfg = bench.simulation.world
    if meter_model is not None:
        cfg = replace(cfg, meter_model=str(meter_model))
    with start_sim_bench(
        cfg, RealClock(), dialects=bench.simulation.dialects, port_base=port_base
    ) as sim:
        yield sim


def open_bench(
    bench: Bench,
    *,
    first_sim_model: Path | None = None,
    operator: Prompt | None = None,
    clock: Clock | None = None,
) -> OpenBench:
    """Open the bench of a loaded bench file (:func:`load_bench`).

    ``first_sim_model`` is the netlist of the first meter (simulated bench only);
    ``operator`` shows a message to the operator and returns when they confirm (real
    hardware: mode and meter changes); ``clock`` overrides the clock the bench file chooses.
    """
    sim = None
    resources: dict[str, str] = {}
    bench = _resolve_simulation(bench)
    if bench.simulation is not None:
        from drivers.sim.bench import start_sim_bench

        world_cfg = bench.simulation.world
        if first_sim_model is not None:
            world_cfg = replace(world_cfg, meter_model=str(first_sim_model))
        clock = clock or (VirtualClock() if bench.simulation.clock == "virtual" else RealClock())
        sim = start_sim_bench(world_cfg, clock, dialects=bench.simulation.dialects)
        resources = dict(sim.resources)
    clock = clock or RealClock()
    sessions: list[ScpiSession] = []
    try:

        def session(role: str) -> tuple[ScpiSession, Profile]:
            spec = bench.instruments[role]
            profile = Profile.load(spec.profile)
            resource = resources.get(role, spec.resource) if sim is not None else spec.resource
            s = ScpiSession(resource, role, profile=profile, timeout_s=spec.timeout_s)
            sessions.append(s)
            return s, profile

        s_sup, p_sup = session("supply")
        supply = Supply(
            s_sup,
            p_sup,
            max_volts=bench.limits.max_volts,
            max_amps=bench.limits.current_limit_amps,
        )
        s_sw, p_sw = session("switch")
        switch = SwitchBoard(s_sw, p_sw)
        s_sc, p_sc = session("scope")
        scope = Scope(s_sc, p_sc)
        meter_spec = bench.instruments["meter"]
        if meter_spec.control == "scpi":
            s_m, p_m = session("meter")
            meter: ManualMeterMode | ScpiMeterMode = ScpiMeterMode(s_m, p_m)
        elif sim is not None:
            world = sim.world
            meter = ManualMeterMode(world.meter_set_mode)  # the simulated operator turns the dial
        else:
            if operator is None:
                raise ValueError("a manual meter needs an operator prompt")
            meter = ManualMeterMode(
                lambda mode: operator(f"Turn the meter's dial to {mode!r}, then confirm.")
            )
        identities = {s.name: s.identify() for s in sessions}
    except BaseException:
        for s in sessions:
            s.close()
        if sim is not None:
            sim.close()
        raise
    log.info("bench open: %s", ", ".join(f"{k}={v}" for k, v in identities.items()))
    return OpenBench(
        supply=supply,
        switch=switch,
        scope=scope,
        meter=meter,
        clock=clock,
        simulated=sim is not None,
        identities=identities,
        sim=sim,
        _sessions=sessions,
        _operator=operator,
    )
