"""The circuit engine's own answer for one discharge, without instruments, SCPI or runner.

Drives a fresh ``BenchWorld`` directly through its physics API on a virtual clock - charge,
isolate, discharge - and evaluates the current-sense input on a fine grid. Tests compare it
with what went through pyvisa-py, the simulated scope's quantisation, the run store and the
analysis.
"""

from __future__ import annotations

from dataclasses import replace

import numpy as np

from drivers.clock import VirtualClock
from drivers.sim.world import BenchWorld
from rig.planning.benchfile import resolve_meter_model


def reference_peak(
    bench_cfg,
    sim_model: str,
    mode: str,
    volts: float,
    load: str,
    dt: float,
    *,
    bandwidth_hz: float | None,
    dwell_s: float = 1.0,
    span_s: float = 2e-6,
) -> float:
    """|Peak| load current (A) of one discharge after a ``dwell_s`` charge to ``volts``."""
    world_cfg = replace(
        bench_cfg.simulation.world,
        meter_model=str(resolve_meter_model(sim_model)),
        bounce=replace(bench_cfg.simulation.world.bounce, max_bounces=0),
    )
    clock = VirtualClock()
    world = BenchWorld(world_cfg, clock)
    world.meter_set_mode(mode)
    ch = bench_cfg.channels
    ld = bench_cfg.load(load)
    if ld.channel is not None:
        world.relay_set([ld.channel], True)
    world.supply_program(volts=volts, amps=bench_cfg.limits.current_limit_amps, output=True)
    world.relay_set([ch.charge], True)
    clock.sleep(dwell_s)
    world.supply_program(output=False)
    world.supply_program(volts=0.0)
    world.relay_set([ch.charge], False)
    t0 = clock.now()
    world.relay_set([ch.discharge], True)
    clock.sleep(span_s)
    t = t0 + np.arange(int(span_s / dt)) * dt
    y = world.scope_inputs(t, [bandwidth_hz])[0]
    sense = bench_cfg.sense
    amps = y / sense.ohms if sense.kind == "shunt" else y * sense.amps_per_volt
    return float(np.max(np.abs(amps)))
