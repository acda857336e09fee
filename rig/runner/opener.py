"""Open the instruments a bench file names, and hand the runner one bench object and a clock.

When the bench file asks for the simulated bench (``resource = "sim"``), the simulated
instruments are started in-process on loopback and reached through pyvisa-py exactly like
hardware: the runner cannot tell the difference. Only two things differ, both physical acts
of an operator: turning the meter's dial (manual meters) and swapping the meter under test;
on the simulated bench the simulation does them.
"""

from __future__ import annotations

import logging
from collections.abc import Callable
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

__all__ = ["OpenBench", "open_bench"]

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


def open_bench(
    bench: Any,
    *,
    first_sim_model: Path | None = None,
    operator: Prompt | None = None,
    clock: Clock | None = None,
) -> OpenBench:
    """Open the bench of a loaded bench file (:func:`rig.planning.benchfile.load_bench`).

    ``first_sim_model`` is the netlist of the first meter (simulated bench only);
    ``operator`` shows a message to the operator and returns when they confirm (real
    hardware: mode and meter changes); ``clock`` overrides the clock the bench file chooses.
    """
    sim = None
    resources: dict[str, str] = {}
    if bench.simulation is not None:
        from drivers.sim.bench import start_sim_bench

        world_cfg = bench.simulation.world
        if first_sim_model is not None:
            world_cfg = replace(world_cfg, meter_model=str(first_sim_model))
        clock = clock or (VirtualClock() if bench.simulation.clock == "virtual" else RealClock())
        sim = start_sim_bench(world_cfg, clock)
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
