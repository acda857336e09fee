"""A nonlinear load on the simulated bench (drivers/sim/world.py with a load file): the world's
discharge current equals the nonlinear engine's on the same network (the engine is checked
against ngspice's diode model in tests/reference/test_nonlinear_ngspice.py)."""

from __future__ import annotations

import numpy as np
import pytest

from drivers.clock import VirtualClock
from drivers.sim.interfaces import BenchWiring, BounceSpec, LoadSpec, SenseSpec, WorldConfig
from drivers.sim.netlist import meter_models_dir
from drivers.sim.world import BenchWorld
from rigbase.loadfile import BUNDLED_LOADS


def test_discharge_into_a_logic_input_on_the_bench() -> None:
    load = LoadSpec("logic", 0.05, 200e-9, 4, str(BUNDLED_LOADS / "logic-3v3.toml"))
    wiring = BenchWiring(loads=(load,), divider_ratio=None, sense=SenseSpec("shunt", 0.1))
    cfg = WorldConfig(
        str(meter_models_dir() / "demo-a.toml"),
        wiring=wiring,
        bounce=BounceSpec(max_bounces=0),
        noise_volts=0.0,
    )
    clock = VirtualClock(100.0)
    w = BenchWorld(cfg, clock)
    w.meter_set_mode("DC V")  # the small-capacitance mode keeps the test short
    w.relay_set([1], True)
    w.supply_program(volts=500.0, amps=0.1, output=True)
    clock.sleep(0.05)
    w.supply_program(volts=0.0, output=False)
    w.relay_set([1], False)
    clock.sleep(1e-3)
    v0 = w.meter_input_volts()
    assert v0 > 400
    # the load's rail has settled at 3.3 V behind its regulator
    t_c = clock.now()
    w.relay_set([4, 2], True)  # load selector, then discharge (no bounce)
    clock.sleep(20e-6)
    t = t_c + np.linspace(0, 10e-6, 2001)
    i = w.scope_inputs(t, [None])[0] / 0.1  # shunt volts to amps
    # the same network, charged state taken from the world: the nonlinear engine directly
    c = w.circuit
    seg = [s for s in w._segments if s.t0 <= t_c][-1]
    x = c.model(seg.closed).advance(seg.x0, seg.u, t_c - seg.t0)
    closed = frozenset(seg.closed) | {"K4:load0", "K2"}
    ref = c.simulate(closed, x[: c.n_net], t - t_c, ["v(bench:sense)"]).y[0] / 0.1
    assert np.abs(ref).max() > 1.0  # the clamp conducts amperes
    # the world's segment solution against the engine on the same network: within 0.5 %
    assert np.abs(i - ref).max() <= 5e-3 * np.abs(ref).max()
    assert i.max() == pytest.approx(ref.max(), rel=5e-3)
