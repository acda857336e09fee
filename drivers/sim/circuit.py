"""Linear R, L, C networks with switches and current sources, and their exact transient.

A :class:`Circuit` holds a network (elements of :mod:`drivers.sim.netlist`), works out the
network actually solved in each switch configuration, and simulates a schedule of switch and
source changes exactly. The method is split by role:

* :mod:`drivers.sim.assembly` stamps the network into state space (modified nodal analysis,
  algebraic nodes eliminated by a Schur complement of ``G``; states are the dynamic node
  voltages (V), then the inductor currents (A), then any output-filter states);
* :mod:`drivers.sim.statespace` evaluates each configuration exactly (eigenbasis, with an
  ``expm`` fallback for ill-conditioned eigenvectors);
* this module chains configurations along the schedule, carrying the state across switch
  instants. A closed switch is a resistance (the element's value), an open switch is absent.

Parasitics, documented and added identically to the ngspice export (:mod:`drivers.sim.spice`)
through :meth:`Circuit.effective_elements`:

* ``STRAY_FARADS`` (1 pF) from every node of a capacitor group that has no capacitive path
  to ground, so the node capacitance matrix is invertible (a floating coupling capacitor);
* ``GMIN_OHMS`` (1 Tohm) from every node that has no resistive/inductive path to ground in
  the present switch configuration (ngspice needs the DC path; the Schur complement needs
  an invertible ``G``). A node reached *only* through inductors also gets it, which makes
  that network very stiff: merge series inductors instead;
* an inductor that forms a cutset with open switches (no closed loop through it) carries
  no current: its state is forced to zero in that configuration (an ideal break; the arc
  is not modelled).

State-space models are cached per (closed switches, outputs).
"""

from __future__ import annotations

import re
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field

import numpy as np

from drivers.sim.assembly import build_model
from drivers.sim.netlist import Element, MeterNetlist
from drivers.sim.statespace import EIG_COND_LIMIT, StateSpace
from rigbase.graph import connected_groups

__all__ = ["GMIN_OHMS", "STRAY_FARADS", "Circuit", "Probe", "StateSpace", "Step", "Trace"]

GMIN_OHMS = 1.0e12
STRAY_FARADS = 1.0e-12
# EIG_COND_LIMIT (imported above) is read here at each model build, so a test may lower it
# on this module to force the expm fallback.

_PROBE_RE = re.compile(r"^\s*([vViI])\s*\(\s*([^,()\s]+)\s*(?:,\s*([^,()\s]+)\s*)?\)\s*$")


@dataclass(frozen=True)
class Probe:
    """One output: ``v`` between nodes ``a`` and ``b`` (``b`` None = ground), or ``i``
    through element ``a`` (its a->b direction), times ``scale``, seen through a cascade of
    first-order low-pass poles ``poles_hz`` (each pole adds one exact state)."""

    kind: str
    a: str
    b: str | None = None
    scale: float = 1.0
    poles_hz: tuple[float, ...] = ()

    @classmethod
    def parse(cls, spec: str | Probe) -> Probe:
        """``"v(n)"``, ``"v(n1,n2)"`` or ``"i(element)"`` -> Probe (a Probe passes through)."""
        if isinstance(spec, Probe):
            return spec
        m = _PROBE_RE.match(spec)
        if not m or (m.group(1).lower() == "i" and m.group(3)):
            raise ValueError(f"output {spec!r}: expected v(node), v(node,node) or i(element)")
        return cls(m.group(1).lower(), m.group(2), m.group(3))


@dataclass(frozen=True)
class Step:
    """From time ``t`` (s) on: switches ``closed`` and source currents ``inputs`` (A)."""

    t: float
    closed: frozenset[str] = frozenset()
    inputs: Mapping[str, float] = field(default_factory=dict)


@dataclass
class Trace:
    """Result of :meth:`Circuit.simulate`: ``y[k, j]`` is output k at time ``t[j]``;
    ``x_end`` the full state (network then filters) at ``t_end``."""

    t: np.ndarray
    y: np.ndarray
    names: tuple[str, ...]
    x_end: np.ndarray
    t_end: float

    def __getitem__(self, name: str) -> np.ndarray:
        return self.y[self.names.index(name)]


class Circuit:
    """A linear network: elements of kinds R, C, L, S (switch), I (current source).

    ``ground`` names the reference node. See the module docstring for the method and the
    parasitics it adds.
    """

    def __init__(self, elements: Iterable[Element], ground: str = "0") -> None:
        self.elements: tuple[Element, ...] = tuple(elements)
        self.ground = ground
        names = [e.name for e in self.elements]
        if len(set(names)) != len(names):
            raise ValueError("element names must be unique")
        self.element_by_name = {e.name: e for e in self.elements}
        nodes = sorted({n for e in self.elements for n in (e.a, e.b)} - {ground})
        self._strays = self._stray_elements(nodes)
        caps = [e for e in self.elements if e.kind == "C"] + self._strays
        dyn = {n for e in caps for n in (e.a, e.b)} - {ground}
        self.dynamic_nodes = tuple(n for n in nodes if n in dyn)
        self.algebraic_nodes = tuple(n for n in nodes if n not in dyn)
        self.nodes = self.dynamic_nodes + self.algebraic_nodes
        self.node_index = {n: k for k, n in enumerate(self.nodes)}
        self.inductors = tuple(e.name for e in self.elements if e.kind == "L")
        self.inputs = tuple(e.name for e in self.elements if e.kind == "I")
        self.switches = frozenset(e.name for e in self.elements if e.kind == "S")
        self.states = tuple(f"v({n})" for n in self.dynamic_nodes) + tuple(
            f"i({n})" for n in self.inductors
        )
        self.n_net = len(self.states)
        self._cache: dict[tuple, StateSpace] = {}

    @classmethod
    def from_netlist(
        cls, netlist: MeterNetlist, extra: Iterable[Element] = (), ground: str | None = None
    ) -> Circuit:
        """Circuit of a meter netlist plus ``extra`` elements; ground defaults to its common."""
        return cls(tuple(netlist.elements) + tuple(extra), ground or netlist.common)

    # -- building blocks -------------------------------------------------------------------
    def _stray_elements(self, nodes: list[str]) -> list[Element]:
        caps = [e for e in self.elements if e.kind == "C"]
        on_cap = {n for e in caps for n in (e.a, e.b)}
        out = []
        for g in _components(nodes + [self.ground], caps):
            if self.ground not in g and g & on_cap:
                out += [
                    Element(f"Cstray:{n}", "C", n, self.ground, STRAY_FARADS) for n in sorted(g)
                ]
        return out

    def _check_closed(self, closed: Iterable[str]) -> frozenset[str]:
        cs = frozenset(closed)
        unknown = cs - self.switches
        if unknown:
            raise ValueError(f"unknown switch(es): {', '.join(sorted(unknown))}")
        return cs

    def dead_inductors(self, closed: Iterable[str]) -> frozenset[str]:
        """Inductors with no closed loop through them in this configuration (current 0)."""
        cs = self._check_closed(closed)
        edges = [
            e for e in self.elements if e.kind in "RCL" or (e.kind == "S" and e.name in cs)
        ] + self._strays
        dead = set()
        for e in self.elements:
            if e.kind == "L":
                rest = [x for x in edges if x is not e]
                if not _connected(e.a, e.b, rest):
                    dead.add(e.name)
        return frozenset(dead)

    def effective_elements(self, closed: Iterable[str]) -> list[Element]:
        """The network actually solved for this configuration: closed switches as resistors,
        open switches and dead inductors removed, strays and GMIN resistors added."""
        cs = self._check_closed(closed)
        dead = self.dead_inductors(cs)
        out: list[Element] = []
        for e in self.elements:
            if e.kind == "S":
                if e.name in cs:
                    out.append(Element(e.name, "R", e.a, e.b, e.value))
            elif not (e.kind == "L" and e.name in dead):
                out.append(e)
        out += self._strays
        nodes = list(self.nodes)
        dc = [e for e in out if e.kind in "RL"]
        gmin = set()
        for g in _components(nodes + [self.ground], dc):
            if self.ground not in g:
                gmin |= g
        # an algebraic node whose resistive group reaches neither ground nor a capacitor
        cond = [e for e in out if e.kind == "R"] + [
            Element(f"Rgmin:{n}", "R", n, self.ground, GMIN_OHMS) for n in gmin
        ]
        dyn = set(self.dynamic_nodes)
        for g in _components(nodes + [self.ground], cond):
            if self.ground not in g and not (g & dyn):
                gmin |= g
        out += [Element(f"Rgmin:{n}", "R", n, self.ground, GMIN_OHMS) for n in sorted(gmin)]
        return out

    def input_vector(self, inputs: Mapping[str, float]) -> np.ndarray:
        """Source currents (A) as the input vector; unknown names -> ValueError."""
        u = np.zeros(len(self.inputs))
        for k, v in inputs.items():
            if k not in self.inputs:
                raise ValueError(f"unknown current source {k!r}")
            u[self.inputs.index(k)] = float(v)
        return u

    def state_vector(self, values: Mapping[str, float] | None = None) -> np.ndarray:
        """Network state from ``{"v(node)": volts, "i(L)": amps}`` (others zero)."""
        x = np.zeros(self.n_net)
        for k, v in (values or {}).items():
            if k not in self.states:
                raise ValueError(f"{k!r} is not a state (states: {', '.join(self.states)})")
            x[self.states.index(k)] = float(v)
        return x

    # -- the model -------------------------------------------------------------------------
    def model(self, closed: Iterable[str], outputs: Sequence[str | Probe] = ()) -> StateSpace:
        """State-space model for switch configuration ``closed`` with these outputs (cached)."""
        cs = self._check_closed(closed)
        probes = tuple(Probe.parse(p) for p in outputs)
        key = (cs, probes)
        ss = self._cache.get(key)
        if ss is None:
            ss = build_model(self, cs, probes, EIG_COND_LIMIT)
            self._cache[key] = ss
        return ss

    # -- convenience -------------------------------------------------------------------------
    def time_constants(
        self, closed: Iterable[str], output: str | Probe | None = None
    ) -> np.ndarray:
        """Time constants (s) of the network in configuration ``closed``, slowest first:
        ``-1/Re(l)`` over the eigenvalues ``l`` of ``A`` (inf for a conserved charge).

        With ``output`` (e.g. ``"v(VIN)"``) only the modes that move that output are kept
        (eigenvector component above 1e-3 of the largest): this drops, for instance, the
        GMIN-set mode of a coupling capacitor whose far end a mode switch has left floating.
        """
        ss = self.model(closed, [output] if output is not None else [])
        lam = ss.eigenvalues()
        if output is not None:
            if not ss.eig_ok:
                raise ValueError("eigenvectors too ill-conditioned to select modes by output")
            w = np.abs(ss.C[0, ss.live] @ ss.eigenvectors)
            lam = lam[w > 1e-3 * w.max()] if w.max() > 0 else lam[:0]
        re = -np.real(lam)
        with np.errstate(divide="ignore"):
            tau = np.where(re > 0, 1.0 / np.where(re > 0, re, 1.0), np.inf)
        return np.sort(tau)[::-1]

    def simulate(
        self,
        schedule: Sequence[Step],
        t: Sequence[float] | np.ndarray,
        x0: np.ndarray | Mapping[str, float] | None = None,
        outputs: Sequence[str | Probe] = (),
        t_end: float | None = None,
    ) -> Trace:
        """Exact response to a schedule of switch/source changes, sampled at times ``t`` (s).

        ``schedule[0].t`` is the start (the state is ``x0`` there: a network state vector or
        a ``state_vector`` mapping; output filters start settled). Each step holds until the
        next one. Returns a :class:`Trace` of the outputs and the full state at ``t_end``
        (default: the last sample time or the last step, whichever is later).
        """
        if not schedule:
            raise ValueError("empty schedule")
        steps = sorted(schedule, key=lambda s: s.t)
        t = np.asarray(t, dtype=float)
        if t.size and t.min() < steps[0].t:
            raise ValueError("sample times before the start of the schedule")
        probes = tuple(Probe.parse(p) for p in outputs)
        xn = x0 if isinstance(x0, np.ndarray) else self.state_vector(x0)
        tend = max(float(t.max()) if t.size else steps[-1].t, steps[-1].t)
        if t_end is not None:
            tend = max(tend, t_end)
        y = np.zeros((len(probes), t.size))
        ss = self.model(steps[0].closed, probes)
        u = self.input_vector(steps[0].inputs)
        x = ss.settle(np.asarray(xn, dtype=float)[: self.n_net], u)
        for k, st in enumerate(steps):
            ss = self.model(st.closed, probes)
            u = self.input_vector(st.inputs)
            x = x.copy()
            x[ss.dead] = 0.0
            t1 = steps[k + 1].t if k + 1 < len(steps) else np.inf
            sel = (t >= st.t) & (t < t1) if np.isfinite(t1) else (t >= st.t)
            if np.any(sel):
                y[:, sel] = ss.outputs(x, u, t[sel] - st.t)
            x = ss.advance(x, u, min(t1, tend) - st.t)
        return Trace(t, y, tuple(_probe_name(p) for p in probes), x, tend)


def _probe_name(p: Probe) -> str:
    if p.kind == "i":
        return f"i({p.a})"
    return f"v({p.a})" if p.b is None else f"v({p.a},{p.b})"


def _components(nodes: Iterable[str], edges: Iterable[Element]) -> list[set[str]]:
    return connected_groups(nodes, ((e.a, e.b) for e in edges))


def _connected(a: str, b: str, edges: Sequence[Element]) -> bool:
    adj: dict[str, list[str]] = {}
    for e in edges:
        adj.setdefault(e.a, []).append(e.b)
        adj.setdefault(e.b, []).append(e.a)
    seen, stack = {a}, [a]
    while stack:
        n = stack.pop()
        if n == b:
            return True
        for m in adj.get(n, ()):
            if m not in seen:
                seen.add(m)
                stack.append(m)
    return False
