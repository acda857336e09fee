"""Small networks of R, L, C, constant current sources and Shockley diodes, solved in time.

The neutral solver shared by the simulated bench (``drivers.sim.nonlinear``, which stamps the
meter's network with its own assembly and hands the matrices here) and the analysis
(``rig.analysis.identify`` / ``predict``, which build an identified source plus a load with
:func:`assemble`). It imports numpy and scipy only, so both sides may use it without either
importing the other.

Diode (Shockley equation, any semiconductor physics textbook)::

    i = IS (exp(v / (N VT)) - 1),   VT = k T / q = 25.85 mV at 300 K

in series with ``RS`` (ohm), the junction shunted by a constant capacitance ``CJO`` (F). This is
ngspice's level-1 diode model (parameters IS, N, RS, CJO; ngspice manual, diode model) with the
grading coefficient M = 0 (junction capacitance independent of voltage) and no transit time;
the reference tests run ngspice with exactly those parameters.

Formulation: every diode becomes ``RS`` (a resistor to an internal node), ``CJO`` (a capacitor
across the junction) and a nonlinear current source ``i(v_j)`` across the junction. The linear
part is reduced to state space ``x' = A x + Bn i(Cj x) + b`` (states: node voltages of
capacitive nodes, then inductor currents; algebraic nodes eliminated by a Schur complement)
and integrated with scipy's Radau (implicit Runge-Kutta of order 5, L-stable) with the exact
Jacobian ``A + Bn diag(di/dv) Cj``. Radau was chosen over BDF and LSODA by measurement on an
identified demo source into the three demo loads (picosecond junction poles beside
millisecond tails): BDF stopped on the logic-input clamp ("step size less than spacing
between numbers") and LSODA on the TVS; where they finished, LSODA was 2-3x faster, BDF no
faster. Radau took 0.1-0.8 s per 50 ms discharge and agrees with ngspice to 0.1 %.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Sequence
from dataclasses import dataclass

import numpy as np

from rigbase.graph import connected_groups

__all__ = [
    "STRAY_FARADS",
    "VT_300K",
    "DiodeParams",
    "DiodeSystem",
    "Part",
    "System",
    "assemble",
    "diode_current",
    "integrate",
    "integrate_dense",
    "stack",
]

# k T / q at 300 K (CODATA 2018 exact k and q), V
VT_300K = 1.380649e-23 * 300.0 / 1.602176634e-19
STRAY_FARADS = 1.0e-12  # from each node of a capacitor group with no capacitive path to ground
GMIN_OHMS = 1.0e12  # from each node without a DC path to ground
_XLIM = 80.0  # exp argument beyond which the exponential continues linearly (overflow guard)


@dataclass(frozen=True)
class DiodeParams:
    """Shockley diode: saturation current ``is_a`` (A), emission coefficient ``n``, series
    resistance ``rs_ohms``, junction capacitance ``cjo_farads`` (constant)."""

    is_a: float
    n: float = 1.0
    rs_ohms: float = 0.0
    cjo_farads: float = 0.0

    def volts_at(self, amps: float, vt: float = VT_300K) -> float:
        """Forward voltage (V) at ``amps`` (A), series resistance included."""
        return self.n * vt * math.log1p(amps / self.is_a) + amps * self.rs_ohms


@dataclass(frozen=True)
class Part:
    """One two-terminal part between nodes ``a`` and ``b``: ``kind`` R (ohm), C (F), L (H),
    I (a constant current, A, flowing from ``a`` through the source into ``b``) or D (a diode,
    anode ``a``, cathode ``b``, parameters in ``diode``)."""

    name: str
    kind: str
    a: str
    b: str
    value: float = 0.0
    diode: DiodeParams | None = None


def diode_current(
    v: np.ndarray, is_a: np.ndarray, nvt: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """Junction current (A) and conductance (S) at junction voltages ``v`` (V)."""
    x = v / nvt
    xc = np.minimum(x, _XLIM)
    e = np.exp(xc)
    i = is_a * (e * (1.0 + (x - xc)) - 1.0)
    g = is_a * e / nvt
    return i, g


@dataclass
class DiodeSystem:
    """``x' = A x + Bn i(Cj x) + b``: a linear network's state space with junction currents
    ``i`` (A) of Shockley junctions (saturation currents ``is_a``, ``nvt`` = N VT in V)."""

    A: np.ndarray
    Bn: np.ndarray
    Cj: np.ndarray
    b: np.ndarray
    is_a: np.ndarray
    nvt: np.ndarray

    def rhs(self, x: np.ndarray) -> np.ndarray:
        i, _ = diode_current(self.Cj @ x, self.is_a, self.nvt)
        return self.A @ x + self.Bn @ i + self.b

    def jac(self, x: np.ndarray) -> np.ndarray:
        _, g = diode_current(self.Cj @ x, self.is_a, self.nvt)
        return self.A + (self.Bn * g) @ self.Cj

    def junction_amps(self, X: np.ndarray) -> np.ndarray:
        """Junction currents (A), one row per junction, for states ``X`` (states x samples)."""
        return diode_current(self.Cj @ X, self.is_a[:, None], self.nvt[:, None])[0]


@dataclass
class System(DiodeSystem):
    """A :class:`DiodeSystem` assembled from parts (see the module docstring).

    ``states`` names each state (``v(node)`` or ``i(inductor)``); ``Vx``/``Vb``/``Vn`` give every
    node's voltage as ``Vx x + Vn i + Vb`` (``Vn`` is zero for nodes that junction currents
    cannot move instantly); ``parts`` are the expanded linear parts and ``junctions`` the
    (name, a, b) of each junction.
    """

    states: tuple[str, ...]
    nodes: tuple[str, ...]
    Vx: np.ndarray
    Vn: np.ndarray
    Vb: np.ndarray
    parts: tuple[Part, ...]
    junctions: tuple[tuple[str, str, str], ...]
    ground: str

    def node_volts(self, X: np.ndarray) -> dict[str, np.ndarray]:
        """Every node's voltage (V) for states ``X`` (states x samples)."""
        ij, _ = diode_current(self.Cj @ X, self.is_a[:, None], self.nvt[:, None])
        V = self.Vx @ X + self.Vn @ ij + self.Vb[:, None]
        out = {n: V[k] for k, n in enumerate(self.nodes)}
        out[self.ground] = np.zeros(X.shape[1])
        return out

    def state_vector(self, volts: dict[str, float] | None = None) -> np.ndarray:
        """States from node voltages ``{"node": V}`` (others and inductor currents zero)."""
        x = np.zeros(len(self.states))
        for k, name in enumerate(self.states):
            node = name[2:-1]
            if name.startswith("v(") and volts and node in volts:
                x[k] = float(volts[node])
        return x


def _expand(parts: Iterable[Part]) -> tuple[list[Part], list[tuple[str, str, str, DiodeParams]]]:
    lin: list[Part] = []
    junc = []
    for p in parts:
        if p.kind != "D":
            lin.append(p)
            continue
        d = p.diode
        if d is None or d.is_a <= 0 or d.n <= 0:
            raise ValueError(f"diode {p.name}: needs is_a > 0 and n > 0")
        if d.cjo_farads <= 0:
            raise ValueError(f"diode {p.name}: needs a junction capacitance cjo_farads > 0")
        top = p.a
        if d.rs_ohms > 0:
            top = f"{p.name}:j"
            lin.append(Part(f"{p.name}:rs", "R", p.a, top, d.rs_ohms))
        lin.append(Part(f"{p.name}:cj", "C", top, p.b, d.cjo_farads))
        junc.append((p.name, top, p.b, d))
    return lin, junc


def _groups(nodes: Iterable[str], edges: Iterable[Part]) -> list[set[str]]:
    return connected_groups(nodes, ((e.a, e.b) for e in edges))


def assemble(parts: Sequence[Part], ground: str = "0", vt: float = VT_300K) -> System:
    """State-space :class:`System` of a network of :class:`Part` (ground node ``ground``).

    Parasitics, as in the linear engine: ``STRAY_FARADS`` from each node of a capacitor group
    that has no capacitive path to ground, ``GMIN_OHMS`` from each node with no resistive or
    inductive path to ground. ValueError for a diode without junction capacitance.
    """
    lin, junc = _expand(parts)
    names = [p.name for p in lin]
    if len(set(names)) != len(names):
        raise ValueError("part names must be unique")
    all_nodes = sorted({n for p in lin for n in (p.a, p.b)} - {ground})
    caps = [p for p in lin if p.kind == "C"]
    on_cap = {n for p in caps for n in (p.a, p.b)}
    extra: list[Part] = []
    for g in _groups(all_nodes + [ground], caps):
        if ground not in g and g & on_cap:
            extra += [Part(f"Cstray:{n}", "C", n, ground, STRAY_FARADS) for n in sorted(g)]
    dc = [p for p in lin if p.kind in "RL"]
    for g in _groups(all_nodes + [ground], dc):
        if ground not in g:
            extra += [Part(f"Rgmin:{n}", "R", n, ground, GMIN_OHMS) for n in sorted(g)]
    lin = lin + extra
    dyn_set = {n for p in lin if p.kind == "C" for n in (p.a, p.b)} - {ground}
    # an algebraic node whose resistive group reaches neither ground nor a capacitive node
    for g in _groups(all_nodes + [ground], [p for p in lin if p.kind == "R"]):
        if ground not in g and not (g & dyn_set):
            lin += [Part(f"Rgmin:{n}", "R", n, ground, GMIN_OHMS) for n in sorted(g)]
    dyn = [n for n in all_nodes if n in dyn_set]
    alg = [n for n in all_nodes if n not in dyn_set]
    nodes = dyn + alg
    ix = {n: k for k, n in enumerate(nodes)}
    inds = [p for p in lin if p.kind == "L"]
    n, nd, nl, nj = len(nodes), len(dyn), len(inds), len(junc)
    Cn, G = np.zeros((n, n)), np.zeros((n, n))
    E = np.zeros((n, nl))
    Bj = np.zeros((n, nj))  # junction currents leave a, enter b
    bs = np.zeros(n)

    def stamp(M: np.ndarray, a: str, b: str, val: float) -> None:
        ia, ib = ix.get(a), ix.get(b)
        if ia is not None:
            M[ia, ia] += val
        if ib is not None:
            M[ib, ib] += val
        if ia is not None and ib is not None:
            M[ia, ib] -= val
            M[ib, ia] -= val

    for p in lin:
        if p.kind == "R":
            stamp(G, p.a, p.b, 1.0 / p.value)
        elif p.kind == "C":
            stamp(Cn, p.a, p.b, p.value)
        elif p.kind == "L":
            k = inds.index(p)
            if p.a in ix:
                E[ix[p.a], k] += 1.0
            if p.b in ix:
                E[ix[p.b], k] -= 1.0
        elif p.kind == "I":
            if p.a in ix:
                bs[ix[p.a]] -= p.value
            if p.b in ix:
                bs[ix[p.b]] += p.value
        else:
            raise ValueError(f"part {p.name}: unknown kind {p.kind!r}")
    for k, (_, a, b, _) in enumerate(junc):
        if a in ix:
            Bj[ix[a], k] -= 1.0
        if b in ix:
            Bj[ix[b], k] += 1.0
    d, al = slice(0, nd), slice(nd, n)
    # algebraic node voltages from the states, the junction currents and the sources
    if n > nd:
        sol = np.linalg.solve(G[al, al], np.column_stack([-G[al, d], -E[al], Bj[al], bs[al]]))
    else:
        sol = np.zeros((0, nd + nl + nj + 1))
    nx = nd + nl
    Vx, Vn, Vb = np.zeros((n, nx)), np.zeros((n, nj)), np.zeros(n)
    Vx[d, :nd] = np.eye(nd)
    Vx[al], Vn[al], Vb[al] = sol[:, :nx], sol[:, nx : nx + nj], sol[:, -1]
    Cdd = Cn[d, d]
    Ed = np.hstack([np.zeros((nd, nd)), E[d]])
    A, Bn, b = np.zeros((nx, nx)), np.zeros((nx, nj)), np.zeros(nx)
    A[:nd] = -np.linalg.solve(Cdd, G[d] @ Vx + Ed)
    Bn[:nd] = np.linalg.solve(Cdd, Bj[d] - G[d] @ Vn)
    b[:nd] = np.linalg.solve(Cdd, bs[d] - G[d] @ Vb)
    if nl:
        Lm = np.array([p.value for p in inds])
        A[nd:] = (E.T @ Vx) / Lm[:, None]
        Bn[nd:] = (E.T @ Vn) / Lm[:, None]
        b[nd:] = (E.T @ Vb) / Lm
    Cj = np.zeros((nj, nx))
    for k, (name, a, bnode, _) in enumerate(junc):
        row_n = np.zeros(nj)
        for node, s in ((a, 1.0), (bnode, -1.0)):
            if node in ix:
                Cj[k] += s * Vx[ix[node]]
                row_n += s * Vn[ix[node]]
        if np.any(np.abs(row_n) > 0):
            raise ValueError(f"diode {name}: its junction voltage is not set by the states")
    states = tuple(f"v({x})" for x in dyn) + tuple(f"i({p.name})" for p in inds)
    is_a = np.array([j[3].is_a for j in junc])
    nvt = np.array([j[3].n * vt for j in junc])
    return System(
        A,
        Bn,
        Cj,
        b,
        is_a,
        nvt,
        states,
        tuple(nodes),
        Vx,
        Vn,
        Vb,
        tuple(lin),
        tuple((j[0], j[1], j[2]) for j in junc),
        ground,
    )


def stack(systems: Sequence[DiodeSystem]) -> DiodeSystem:
    """One :class:`DiodeSystem` holding ``systems`` side by side (block-diagonal matrices,
    states concatenated in order): integrating it once integrates all of them with one step
    sequence and one factorisation per step, where separate integrations would pay the
    integrator's per-step overhead once each."""
    from scipy.linalg import block_diag

    return DiodeSystem(
        block_diag(*[s.A for s in systems]),
        block_diag(*[s.Bn for s in systems]),
        block_diag(*[s.Cj for s in systems]),
        np.concatenate([s.b for s in systems]),
        np.concatenate([s.is_a for s in systems]),
        np.concatenate([s.nvt for s in systems]),
    )


def integrate(
    system: DiodeSystem,
    x0: np.ndarray,
    t: np.ndarray,
    rtol: float = 1e-6,
    atol: float = 1e-10,
    method: str = "Radau",
) -> np.ndarray:
    """States (states x samples) at times ``t`` (s, increasing, from 0) from ``x0`` at 0.

    ``method`` is a scipy ``solve_ivp`` method name (``Radau``, ``BDF`` or ``LSODA``).
    RuntimeError when the integrator fails.
    """
    # scipy.integrate takes ~0.3 s to import; imported where used so that the modules that
    # only name parts (loading a netlist, `rig report`) do not pay for it
    from scipy.integrate import solve_ivp

    t = np.asarray(t, dtype=float)
    if t.size == 0:
        return np.zeros((len(x0), 0))
    sol = solve_ivp(
        lambda _t, x: system.rhs(x),
        (0.0, float(t[-1])),
        np.asarray(x0, dtype=float),
        method=method,
        t_eval=t,
        jac=lambda _t, x: system.jac(x),
        rtol=rtol,
        atol=atol,
        first_step=min(1e-13, float(t[-1]) / 10) if t[-1] > 0 else None,
    )
    if not sol.success:
        raise RuntimeError(f"nonlinear integration failed: {sol.message}")
    return sol.y


def integrate_dense(
    system: DiodeSystem, x0: np.ndarray, t_end: float, rtol: float = 1e-6, atol: float = 1e-10
):
    """The solution from ``x0`` at 0 to ``t_end`` (s) as a callable of time (scipy
    ``OdeSolution``: ``sol(t)`` gives states x len(t)), Radau with the exact Jacobian."""
    from scipy.integrate import solve_ivp  # lazily: see integrate

    t_end = max(float(t_end), 1e-15)
    sol = solve_ivp(
        lambda _t, x: system.rhs(x),
        (0.0, t_end),
        np.asarray(x0, dtype=float),
        method="Radau",
        dense_output=True,
        jac=lambda _t, x: system.jac(x),
        rtol=rtol,
        atol=atol,
        first_step=min(1e-13, t_end / 10),
    )
    if not sol.success:
        raise RuntimeError(f"nonlinear integration failed: {sol.message}")
    return sol.sol
