"""A demo meter charged and discharged into a load file's circuit, for the nonlinear tests.

The meter's charge path is the bench's (a 1 kV source behind 1 kohm + 100 kohm through relay
``Kc``, the 100 Mohm divider probe on the input); its discharge path is relay ``Kd`` (0.05 ohm closed) and 200 nH of wiring into the
load. Ground truth for the identification tests and the ngspice comparison.
"""

from __future__ import annotations

import re
from pathlib import Path

import numpy as np

from drivers.sim.circuit import Step
from drivers.sim.netlist import Element, MeterNetlist, load_netlist, meter_models_dir
from drivers.sim.nonlinear import NonlinearCircuit, load_elements
from rigbase.loadfile import LoadModel, read_load

ROOT = Path(__file__).resolve().parents[1]
LOADS_DIR = ROOT / "sequences" / "loads"
WIRING_HENRY = 200e-9
CONTACT_OHMS = 0.05
DIVIDER_OHMS = 100e6  # the bench's divider probe on the meter input


def demo_load(name: str) -> LoadModel:
    """A load file of ``sequences/loads``."""
    return read_load(LOADS_DIR / f"{name}.toml")


def meter_into(
    meter: str, load: LoadModel, extra_ohms: float = 0.0
) -> tuple[NonlinearCircuit, MeterNetlist]:
    """Meter ``meter`` (demo netlist) with the charge path and a discharge path into ``load``
    (plus ``extra_ohms`` in series, e.g. a shunt)."""
    net = load_netlist(meter_models_dir() / f"{meter}.toml")
    els, juncs, consts = load_elements(load, "ld:in", net.common, prefix="ld:")
    top = "dis"
    path = [Element("Kd", "S", net.input, "dis", CONTACT_OHMS)]
    if extra_ohms > 0:
        path.append(Element("Rextra", "R", "dis", "dis2", extra_ohms))
        top = "dis2"
    path.append(Element("Lw", "L", top, "ld:in", WIRING_HENRY))
    extra = [
        Element("Rdiv", "R", net.input, net.common, DIVIDER_OHMS),
        Element("Isup", "I", net.common, "sup"),
        Element("Rout", "R", "sup", net.common, 1e3),
        Element("Rchg", "R", "sup", "chg", 100e3),
        Element("Kc", "S", "chg", net.input, 0.05),
        *path,
        *els,
    ]
    return NonlinearCircuit(tuple(net.elements) + tuple(extra), juncs, consts, net.common), net


def charged_state(
    nl: NonlinearCircuit, net: MeterNetlist, load: LoadModel, mode: str, volts: float
) -> np.ndarray:
    """Network state after charging to ``volts`` for 1.5 s with the load disconnected, the
    load at its own initial voltages."""
    c = nl.circuit
    ms = net.closed_switches(mode)
    x0 = c.simulate([Step(0.0, ms | {"Kc"}, {"Isup": volts / 1e3, **nl.consts})], [], t_end=1.5)
    x = x0.x_end[: c.n_net].copy()
    for node, v in load.initial_volts.items():
        x[c.states.index(f"v(ld:{node})")] = v
    return x


# --------------------------------------------------------------------------------------------
# Runs on the simulated bench for the identification tests and benchmark
# --------------------------------------------------------------------------------------------

BENCH_LOADS = """
[[loads]]
name = "1k"
ohms = 1000
henry = "300n"
channel = 6

[[loads]]
name = "500R\""""

SEQUENCE = """
[sequence]
name = "identification"
repetitions = {reps}

[[meters]]
model = "{model}"
serial = "ID-0001"
rating = "CAT III 1000 V (fictitious)"
modes = ["{mode}"]
sim_model = "{meter}"

[charge]
volts = [{volts}]
dwell_s = 0.5

[discharge]
loads = ["short", "1k"]

[bleed]
hold_s = 0.05

[scope]
current_range_amps = 80
current_offset_amps = 20
trigger_level_amps = 0.2
bits = 16

[scope.captures.peak]
sample_interval_s = "1n"
points = 20000
trigger_offset_s = "-2u"
bandwidth_hz = "500M"

[scope.captures.charge]
sample_interval_s = "200n"
points = 275000
trigger_offset_s = "-5m"
bandwidth_hz = "5M"
"""


def identification_run(
    folder: Path,
    meter: str,
    mode: str = "AC V",
    seed: int = 1,
    reps: int = 25,
    volts: float = 1000.0,
) -> Path:
    """Run ``meter`` into a short and 1 kohm on the simulated bench (virtual clock, bench seed
    ``seed``), analyse it, and return the run folder (its manifest holds bench and sequence)."""
    from rig.analysis.analyze import analyze_run
    from rig.planning.plan import build_plan
    from rig.planning.sequence import load_sequence
    from rig.runner.cycle import Runner
    from rig.runner.opener import load_bench, open_bench
    from rig.store.runfolder import RunWriter

    folder.mkdir(parents=True, exist_ok=True)
    text = (ROOT / "sequences" / "benches" / "sim-demo.toml").read_text()
    text = text.replace('\n[[loads]]\nname = "500R"', BENCH_LOADS, 1)
    text = re.sub(r"^seed = \d+", f"seed = {seed}", text, count=1, flags=re.M)
    (folder / "bench.toml").write_text(text)
    model = load_netlist(meter_models_dir() / f"{meter}.toml").model
    seq_text = SEQUENCE.format(reps=reps, model=model, mode=mode, meter=meter, volts=volts)
    (folder / "seq.toml").write_text(seq_text)
    bench = load_bench(folder / "bench.toml")
    seq = load_sequence(folder / "seq.toml", bench)
    plan = build_plan(seq, bench)
    manifest = {"sequence": seq.raw, "bench": bench.raw, "simulated": True, "status": "created"}
    writer = RunWriter.create(
        folder / "results",
        "run",
        manifest,
        [{**e.to_dict(), "event": e.index} for e in plan.events],
    )
    with writer, open_bench(bench, first_sim_model=seq.meters[0].sim_model) as ob:
        outcome = Runner(ob, bench, seq, plan, writer).run()
    if outcome.status != "complete":
        raise RuntimeError(f"identification run did not complete: {outcome.error}")
    analyze_run(writer.path)
    return writer.path
