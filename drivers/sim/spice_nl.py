"""ngspice decks for networks with diodes: the reference for the nonlinear engine.

The deck is the linear export of :func:`drivers.sim.spice.to_deck` (same parasitics, initial
conditions, ``.tran ... uic``, ``wrdata``) with each junction current source replaced by an
ngspice diode (``D`` element, level-1 model). With ``own_parts`` (the default) the diode's
series resistance and junction capacitance go into its ``.model`` (``RS``, ``CJO``, ``M=0``
for a constant capacitance) so ngspice's own diode model is compared, not our expansion of it;
a diode whose internal node carries a stray capacitance or GMIN resistor of the export keeps
the explicit RS and CJ elements instead, so both engines still solve the same network.
"""

from __future__ import annotations

import re
from collections.abc import Iterable, Mapping, Sequence

import numpy as np

from drivers.sim.circuit import Probe
from drivers.sim.nonlinear import NonlinearCircuit
from drivers.sim.spice import SpiceResult, _sanitize, run_deck, to_deck

__all__ = ["run_ngspice_nl", "to_deck_nl"]


def to_deck_nl(
    nl: NonlinearCircuit,
    closed: Iterable[str],
    x0: np.ndarray,
    t_stop: float,
    t_step: float,
    outputs: Sequence[str | Probe],
    max_step: float | None = None,
    reltol: float = 1e-5,
    own_parts: bool = True,
    inputs: Mapping[str, float] | None = None,
) -> str:
    """Deck text (see the module docstring); ``inputs`` override constant source currents."""
    c = nl.circuit
    closed = list(closed)
    deck = to_deck(
        c,
        closed,
        {**nl.consts, **(inputs or {})},
        x0,
        t_stop,
        t_step,
        outputs,
        "out.txt",
        max_step,
        reltol,
    )
    nodemap = {c.ground: "0"}
    for k, n in enumerate(c.nodes):
        nodemap[n] = f"n{k + 1}_{_sanitize(n)}"
    lines = deck.splitlines()

    def find(elname: str) -> int:
        pat = re.compile(rf"^[a-z]\d+_{re.escape(_sanitize(elname))} ")
        hits = [k for k, ln in enumerate(lines) if pat.match(ln)]
        if len(hits) != 1:
            raise ValueError(f"{elname}: not found once in the exported deck")
        return hits[0]

    models = []
    drop: set[int] = set()
    for k, j in enumerate(nl.junctions):
        d = j.diode
        mname = f"dm{k + 1}"
        src = find(j.source)
        inner = nodemap[j.a]
        others = [
            ln
            for i, ln in enumerate(lines)
            if i != src and re.search(rf"\s{re.escape(inner)}(\s|$)", ln)
        ]
        # the internal node is touched by RS, CJ and the source only: ngspice's own parts
        own = own_parts and j.a != j.outer and len(others) == 2
        if own:
            drop |= {find(f"{j.name}:rs"), find(f"{j.name}:cj")}
            a = nodemap[j.outer]
            models.append(
                f".model {mname} D(IS={d.is_a:.12g} N={d.n:.12g} RS={d.rs_ohms:.12g} "
                f"CJO={d.cjo_farads:.12g} M=0)"
            )
            # the junction capacitor's initial voltage becomes the diode's IC
            vj = _branch_ic(lines[find(f"{j.name}:cj")])
            lines[src] = f"d{k + 1}_j {a} {nodemap[j.b]} {mname} ic={vj:.12g}"
        else:
            models.append(f".model {mname} D(IS={d.is_a:.12g} N={d.n:.12g})")
            lines[src] = f"d{k + 1}_j {inner} {nodemap[j.b]} {mname}"
    lines = [ln for i, ln in enumerate(lines) if i not in drop]
    at = next(i for i, ln in enumerate(lines) if ln.startswith(".options"))
    return "\n".join(lines[:at] + models + lines[at:])


def _branch_ic(line: str) -> float:
    m = re.search(r"ic=(\S+)", line)
    return float(m.group(1)) if m else 0.0


def run_ngspice_nl(
    nl: NonlinearCircuit,
    closed: Iterable[str],
    x0: np.ndarray,
    t_stop: float,
    t_step: float,
    outputs: Sequence[str | Probe],
    max_step: float | None = None,
    reltol: float = 1e-6,
    own_parts: bool = True,
    timeout_s: float = 600.0,
) -> SpiceResult:
    """Run ``ngspice -b`` on :func:`to_deck_nl`'s deck; results as :class:`SpiceResult`."""
    deck = to_deck_nl(nl, closed, x0, t_stop, t_step, outputs, max_step, reltol, own_parts)
    return run_deck(deck, t_stop, outputs, timeout_s)
