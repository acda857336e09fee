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
from rigbase.nonlinear import VT_300K, DiodeParams, DiodeSystem, integrate, integrate_dense

__all__ = ["Junction", "NonlinearCircuit", "NonlinearStateSpace", "load_elements"]


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


class NonlinearStateSpace:
    """The nonlinear counterpart of :class:`drivers.sim.statespace.StateSpace` for one switch
    configuration, with the same ``outputs``/``advance``/``settle`` calls, so the bench world
    can hold a segment of a network with diodes like any other. Each (start state, inputs)
    pair is integrated once (Radau, dense output) and extended when a later time is asked.
    Junction sources' entries of an input vector are ignored (the junctions set them); the
    load's constant sources are added to it."""

    def __init__(self, ss, nj: int, jx: np.ndarray, u_const: np.ndarray, diodes) -> None:
        self._ss = ss
        self.n_net, self.n_states, self.dead = ss.n_net, ss.n_states, ss.dead
        self.A, self.B, self.C, self.D = ss.A, ss.B, ss.C[nj:], ss.D[nj:]
        self._nj, self._jx, self._u_const = nj, jx, u_const
        is_a = np.array([d.is_a for d in diodes])
        nvt = np.array([d.n for d in diodes]) * VT_300K
        self._sys = DiodeSystem(ss.A, ss.B[:, jx], ss.C[:nj], np.zeros(ss.A.shape[0]), is_a, nvt)
        self._sols: dict[tuple[bytes, bytes], tuple[float, object]] = {}

    def _u(self, u: np.ndarray) -> np.ndarray:
        u = np.array(u, dtype=float)
        u[self._jx] = 0.0
        return u + self._u_const

    def _states(self, x: np.ndarray, u: np.ndarray, dt: np.ndarray) -> np.ndarray:
        ue = self._u(u)
        key = (np.asarray(x, dtype=float).tobytes(), ue.tobytes())
        t_max = float(np.max(dt)) if np.size(dt) else 0.0
        have = self._sols.get(key)
        if have is None or have[0] < t_max:
            t_end = max(t_max, 2 * have[0] if have else t_max, 1e-9)
            self._sys.b = self._ss.B @ ue
            have = (t_end, integrate_dense(self._sys, x, t_end))
            if len(self._sols) > 64:  # old segments are rarely asked again
                self._sols.clear()
            self._sols[key] = have
        self._sys.b = self._ss.B @ ue
        return np.asarray(have[1](np.asarray(dt, dtype=float)))

    def outputs(self, x: np.ndarray, u: np.ndarray, dt: np.ndarray) -> np.ndarray:
        dt = np.atleast_1d(np.asarray(dt, dtype=float))
        X = self._states(x, u, dt).reshape(len(x), dt.size)
        U = np.repeat(self._u(u)[:, None], dt.size, axis=1)
        U[self._jx] = self._sys.junction_amps(X)
        return self.C @ X + self.D @ U

    def advance(self, x: np.ndarray, u: np.ndarray, dt: float) -> np.ndarray:
        return self._states(x, u, np.array([dt]))[:, 0]

    def settle(self, x_net: np.ndarray, u: np.ndarray) -> np.ndarray:
        ue = self._u(u)
        x = np.zeros(self.n_states)
        x[: self.n_net] = np.asarray(x_net, dtype=float)[: self.n_net]
        ue[self._jx] = self._sys.junction_amps(x[:, None])[:, 0]
        return self._ss.settle(x_net, ue)


class NonlinearCircuit:
    """A :class:`Circuit` whose elements include diode junction sources (see module docstring).

    ``junctions`` name the junction current sources; ``consts`` are constant source currents
    (A) of the other current sources. Anything else is the underlying circuit's
    (``n_net``, ``states``, ``input_vector``, ``time_constants``...); :meth:`model` returns a
    :class:`NonlinearStateSpace`.
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
        self._models: dict[tuple, NonlinearStateSpace] = {}

    def __getattr__(self, name: str):
        return getattr(self.__dict__["circuit"], name)

    def model(
        self, closed: Iterable[str], outputs: Sequence[str | Probe] = ()
    ) -> NonlinearStateSpace:
        """The nonlinear model of configuration ``closed`` with outputs ``outputs`` (filter
        poles allowed: they are states of the integration)."""
        probes = tuple(Probe.parse(o) for o in outputs)
        key = (frozenset(closed), probes)
        m = self._models.get(key)
        if m is None:
            c = self.circuit
            jp = [Probe("v", j.a, j.b) for j in self.junctions]
            ss = c.model(key[0], jp + list(probes))
            nj = len(self.junctions)
            if np.any(np.abs(ss.D[:nj]) > 0):
                raise ValueError("a junction voltage depends on junction currents")
            jx = np.array([c.inputs.index(j.source) for j in self.junctions], dtype=int)
            m = NonlinearStateSpace(
                ss, nj, jx, c.input_vector(self.consts), [j.diode for j in self.junctions]
            )
            self._models[key] = m
        return m

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
