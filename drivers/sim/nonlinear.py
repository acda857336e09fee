"""The circuit engine with nonlinear loads: a linear network plus Shockley diodes.

The linear engine (:mod:`drivers.sim.circuit`) stays exact between switching instants; a load
with diodes (:class:`rigbase.loadfile.LoadModel`) makes the network nonlinear. Each diode is
expanded into its series resistance, its junction capacitance and a current source across the
junction (element ``<diode>:j``, kind ``I``); the linear engine's own assembly turns the
expanded network into state space ``x' = A x + B u`` for the switch configuration, the
junction voltages are extra outputs, and :func:`rigbase.nonlinear.integrate` integrates
``u_j = i(v_j)`` with scipy's Radau and the exact Jacobian (the module docstring there says why
Radau). Constant current sources of the load (``I`` parts) are ordinary inputs.

Checked against ngspice's diode model with the same parameters
(``tests/reference/test_nonlinear_ngspice.py``).
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass

import numpy as np

from drivers.sim.circuit import Circuit, Probe, Trace
from drivers.sim.netlist import Element
from rigbase.loadfile import LoadModel
from rigbase.nonlinear import VT_300K, DiodeParams, DiodeSystem, integrate

__all__ = ["Junction", "NonlinearCircuit", "load_elements"]


@dataclass(frozen=True)
class Junction:
    """One diode junction: source element ``source`` across nodes ``a`` (anode side, after
    RS) and ``b``; ``outer`` is the anode before RS; ``diode`` its parameters."""

    name: str
    source: str
    a: str
    b: str
    outer: str
    diode: DiodeParams


def load_elements(
    load: LoadModel, input_node: str, common_node: str, prefix: str = "load:"
) -> tuple[list[Element], list[Junction], dict[str, float]]:
    """The load's parts as engine elements between ``input_node`` and ``common_node``:
    (elements, junctions, constant source currents by element name in A)."""
    els: list[Element] = []
    juncs: list[Junction] = []
    consts: dict[str, float] = {}
    for p in load.renamed(prefix, input_node, common_node):
        if p.kind in "RCL":
            els.append(Element(p.name, p.kind, p.a, p.b, p.value))
        elif p.kind == "I":
            els.append(Element(p.name, "I", p.a, p.b))
            consts[p.name] = p.value
        else:
            d = p.diode
            assert d is not None
            top = p.a
            if d.rs_ohms > 0:
                top = f"{p.name}:int"
                els.append(Element(f"{p.name}:rs", "R", p.a, top, d.rs_ohms))
            els.append(Element(f"{p.name}:cj", "C", top, p.b, d.cjo_farads))
            els.append(Element(f"{p.name}:j", "I", top, p.b))
            juncs.append(Junction(p.name, f"{p.name}:j", top, p.b, p.a, d))
    return els, juncs, consts


class NonlinearCircuit:
    """A :class:`Circuit` whose elements include diode junction sources (see module docstring).

    ``junctions`` name the junction current sources; ``consts`` are constant source currents
    (A) of the other current sources.
    """

    def __init__(
        self,
        elements: Iterable[Element],
        junctions: Sequence[Junction],
        consts: Mapping[str, float] | None = None,
        ground: str = "0",
    ) -> None:
        self.circuit = Circuit(elements, ground)
        self.junctions = tuple(junctions)
        self.consts = dict(consts or {})

    def _system(
        self, closed: Iterable[str], outputs: Sequence[str | Probe], inputs: Mapping[str, float]
    ) -> tuple[DiodeSystem, np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        c = self.circuit
        probes = [Probe("v", j.a, j.b) for j in self.junctions]
        probes += [Probe.parse(o) for o in outputs]
        ss = c.model(closed, probes)
        if ss.A.shape[0] != c.n_net:
            raise ValueError("filtered outputs are not supported by the nonlinear engine")
        nj = len(self.junctions)
        jx = [c.inputs.index(j.source) for j in self.junctions]
        u_const = c.input_vector({**self.consts, **inputs})
        if np.any(np.abs(ss.D[:nj]) > 0):
            raise ValueError("a junction voltage depends on junction currents (no capacitance)")
        bn = ss.B[:, jx]
        sysm = DiodeSystem(
            ss.A.copy(),
            bn,
            ss.C[:nj].copy(),
            ss.B @ u_const,
            np.array([j.diode.is_a for j in self.junctions]),
            np.array([j.diode.n for j in self.junctions]) * VT_300K,
        )
        return sysm, ss.C[nj:], ss.D[nj:], u_const, np.array(jx, dtype=int)

    def simulate(
        self,
        closed: Iterable[str],
        x0: np.ndarray,
        t: np.ndarray,
        outputs: Sequence[str | Probe] = (),
        inputs: Mapping[str, float] | None = None,
        rtol: float = 1e-6,
        method: str = "Radau",
    ) -> Trace:
        """Response of one switch configuration from network state ``x0`` at t = 0, sampled
        at ``t`` (s): outputs as in :meth:`Circuit.simulate` (no filter poles)."""
        cs = frozenset(closed)
        sysm, C, D, u_const, jx = self._system(cs, outputs, inputs or {})
        ss = self.circuit.model(cs)
        x = np.asarray(x0, dtype=float).copy()
        x[ss.dead] = 0.0
        t = np.asarray(t, dtype=float)
        X = integrate(sysm, x, t, rtol=rtol, method=method)
        U = np.repeat(u_const[:, None], t.size, axis=1)
        U[jx] = sysm.junction_amps(X)
        y = C @ X + D @ U
        names = tuple(_name(Probe.parse(o)) for o in outputs)
        return Trace(t, y, names, X[:, -1].copy(), float(t[-1]) if t.size else 0.0)


def _name(p: Probe) -> str:
    if p.kind == "i":
        return f"i({p.a})"
    return f"v({p.a})" if p.b is None else f"v({p.a},{p.b})"
