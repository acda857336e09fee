"""Self-discharge sweep on the simulated bench, end to end (runner, store, analysis).

The fitted self-discharge time constant of each AC mode must agree within 5 % with the
slowest time constant of the meter model's own network with its input open, taken from the
circuit engine's state matrix (eigenvalues of A). Physics of the check: with the input
open, every state decays as a sum of exponentials; after the fast modes have died away the
stored charge follows the slowest one (natural response of a linear RC network, any
circuits textbook).
"""

from __future__ import annotations

from dataclasses import replace

import pandas as pd
import pytest

from drivers.sim.circuit import Circuit
from drivers.sim.netlist import load_netlist
from rig.analysis.analyze import analyze_run
from rig.planning.benchfile import resolve_meter_model
from rig.runner.opener import load_bench

from .test_runner import BENCH, run_once

SWEEP = """
[sequence]
name = "self-discharge"
repetitions = 3

[[meters]]
model = "Sweep meter"
serial = "S-1"
modes = ["AC V", "AC mV"]
sim_model = "demo-a"

[charge]
volts = [1000]
dwell_s = 1.0

[discharge]
loads = ["short"]
delays_s = [0.1, 0.5, 1.0, 1.5, 2.0]

[bleed]
hold_s = 0.5

[scope]
sample_interval_s = 2e-7
points = 205000
trigger_offset_s = -8e-3  # a long pre-trigger: the baseline error is integrated over the record
current_range_amps = 60
current_offset_amps = 25
trigger_level_amps = 0.05
trigger_slope = "POSitive"
bits = 16
bandwidth_hz = 5e6
"""


def test_fitted_self_discharge_matches_slowest_time_constant(tmp_path):
    cfg = load_bench(BENCH)
    # the meter's own network: no divider probe loading the input during the delay
    world = cfg.simulation.world
    world = replace(world, wiring=replace(world.wiring, divider_ratio=None))
    cfg = replace(cfg, divider_ratio=None, simulation=replace(cfg.simulation, world=world))
    seq = tmp_path / "sweep.toml"
    seq.write_text(SWEEP)
    outcome, run, plan, truth, cfg = run_once(tmp_path, seq, cfg)
    assert outcome.status == "complete", outcome.error
    analyze_run(run)
    fits = pd.read_csv(run / "selfdischarge.csv")
    netlist = load_netlist(resolve_meter_model("demo-a"))
    circuit = Circuit.from_netlist(netlist)
    for mode in ("AC V", "AC mV"):
        slowest = float(circuit.time_constants(netlist.closed_switches(mode))[0])
        fitted = float(fits.loc[fits["mode"] == mode, "tau_s"].iloc[0])
        # 5 % agreement (issue target); reference: the engine's state matrix eigenvalues
        assert fitted == pytest.approx(slowest, rel=0.05), (mode, fitted, slowest)
