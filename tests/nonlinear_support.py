"""A demo meter charged and discharged into a load file's circuit, for the nonlinear tests.

The meter's charge path is the bench's (a 1 kV source behind 1 kohm + 100 kohm through relay
``Kc``); its discharge path is relay ``Kd`` (0.05 ohm closed) and 200 nH of wiring into the
load. Ground truth for the identification tests and the ngspice comparison.
"""

from __future__ import annotations

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
