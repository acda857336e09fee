"""Checks of a meter netlist before any run, and its slowest discharge time constant per mode.

:func:`check_netlist` reads a netlist exactly as the simulated world will (keys, units and
values through :func:`drivers.sim.netlist.load_netlist`, so a misspelt key such as ``farad``
is refused there) and adds the topology checks a typo in a node name would otherwise slip
past: a node touched by only one element terminal (``GND`` written for ``COM`` leaves a
dangling end), and a node with no DC path (resistors, inductors, switches closed in some
mode) to the common node in any mode, whose charge the bench could neither set nor bleed.
Every problem is one :class:`rigbase.errors.FileFormatError` naming the file, the key and
the problem.

:func:`discharge_time_constants` builds the bench world around the netlist (the same
construction the simulated bench uses) and returns, per mode, the slowest time constant that
moves the discharge current when the discharge relay closes into a given load: the
eigenvalues of the network's state matrix (textbook state-variable analysis).
"""

from __future__ import annotations

from dataclasses import replace
from pathlib import Path

import numpy as np

from drivers.clock import VirtualClock
from drivers.sim.circuit import Probe
from drivers.sim.interfaces import WorldConfig
from drivers.sim.netlist import MeterNetlist, load_netlist
from rigbase.errors import FileFormatError
from rigbase.graph import connected_groups

__all__ = ["SELECT_RELATIVE", "check_netlist", "discharge_time_constants"]

#: a mode counts when its eigenvector's weight in the discharge current exceeds this share of
#: the largest (the real slow modes of the demo meters weigh about 1e-4, GMIN leaks 1e-11)
SELECT_RELATIVE = 1e-8


def check_netlist(path: str | Path) -> MeterNetlist:
    """Read and check a meter netlist; FileFormatError on the first problem."""
    net = load_netlist(path)
    ends: dict[str, list[str]] = {}
    for e in net.elements:
        for node in (e.a, e.b):
            ends.setdefault(node, []).append(e.name)
    for node, names in sorted(ends.items()):
        if len(names) == 1 and node not in (net.input, net.common):
            raise FileFormatError(
                path,
                f"element.{names[0]}.nodes",
                f"node {node!r} is connected to nothing else (a misspelt node name? "
                f"the terminals are {net.input!r} and {net.common!r})",
            )
    # DC paths in any mode: R, L, and every switch (closed in at least one mode)
    dc = [
        (e.a, e.b)
        for e in net.elements
        if e.kind in "RL" or (e.kind == "S" and net.closed_in.get(e.name))
    ]
    bled = next(g for g in connected_groups(ends, dc) if net.common in g)
    for node in sorted(ends):
        if node not in bled:
            raise FileFormatError(
                path,
                f"element.{ends[node][0]}.nodes",
                f"node {node!r} has no DC path to {net.common!r} in any mode "
                "(only capacitors or open switches reach it): its charge could never be bled",
            )
    return net


def discharge_time_constants(
    config: WorldConfig, meter_model: str | Path, load: str
) -> dict[str, float]:
    """Per mode of the netlist at ``meter_model``: the slowest time constant (s) of the
    discharge current when the discharge relay closes into the bench load named ``load``."""
    from drivers.sim.world import BenchWorld  # the world's own bench construction

    cfg = replace(config, meter_model=str(meter_model))
    world = BenchWorld(cfg, VirtualClock())
    net, circuit, wiring = world.netlist, world.circuit, cfg.wiring
    names = [ld.name for ld in wiring.loads]
    if load not in names:
        raise ValueError(f"no load {load!r} on the bench (loads: {', '.join(names)})")
    i = names.index(load)
    closed = {f"K{wiring.discharge_channel}"}
    if wiring.loads[i].channel is not None:
        closed.add(f"K{wiring.loads[i].channel}:load{i}")
    probe = Probe("i", f"K{wiring.discharge_channel}")
    out: dict[str, float] = {}
    for mode in net.modes:
        ss = circuit.model(closed | net.closed_switches(mode), [probe])
        lam = ss.eigenvalues()
        # modes that move the current: a coupling capacitor whose far end a mode switch has
        # left floating has only its GMIN leak (a mode weighted ~1e-12 of the largest)
        w = np.abs(ss.C[0, ss.live] @ ss.eigenvectors)
        keep = (w > SELECT_RELATIVE * w.max()) & (lam.real < 0) if w.max() > 0 else lam.real < 0
        taus = -1.0 / lam[keep].real
        out[mode] = float(taus.max()) if taus.size else float("nan")
    return out
