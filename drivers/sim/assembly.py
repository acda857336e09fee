"""Assembly of a switched R/L/C network into a state-space model, with bandwidth poles.

Modified nodal analysis reduced to state space: node equations ``Cn v' + G v + E iL = Bs u``
and inductor equations ``L iL' = E^T v`` are stamped from the network actually solved in
one switch configuration (:meth:`drivers.sim.circuit.Circuit.effective_elements`). Nodes
touched by a capacitor are *dynamic* (their voltages are states); the others are
*algebraic* and are eliminated by a Schur complement of ``G``. States are therefore the
dynamic node voltages (V), then the inductor currents (A). Each output (a node voltage or
an element current, times a scale) becomes a row of ``C``/``D``; each first-order low-pass
pole of an output (an instrument's bandwidth limit) adds one exact state
``x_k' = w (y - x_k)`` with ``w = 2 pi f``, cascaded in the order given.
"""

from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np

from drivers.sim.statespace import StateSpace

if TYPE_CHECKING:
    from drivers.sim.circuit import Circuit, Probe

__all__ = ["build_model"]


def build_model(
    circuit: Circuit, cs: frozenset[str], probes: tuple[Probe, ...], cond_limit: float
) -> StateSpace:
    """State-space model of ``circuit`` with switches ``cs`` closed and outputs ``probes``.

    ``cond_limit`` is handed to :class:`StateSpace` (eigenvector condition limit).
    """
    n, nl, ni = len(circuit.nodes), len(circuit.inductors), len(circuit.inputs)
    nd = len(circuit.dynamic_nodes)
    eff = circuit.effective_elements(cs)
    dead = circuit.dead_inductors(cs)
    Cn, G = np.zeros((n, n)), np.zeros((n, n))
    E, Bs = np.zeros((n, nl)), np.zeros((n, ni))
    Lm = np.zeros(nl)

    def stamp(M, e, val):
        ia, ib = circuit.node_index.get(e.a), circuit.node_index.get(e.b)
        for i, s in ((ia, 1.0), (ib, -1.0)):
            if i is None:
                continue
            M[i, i] += val
            j = ib if s > 0 else ia
            if j is not None:
                M[i, j] -= val

    for e in eff:
        if e.kind == "R":
            stamp(G, e, 1.0 / e.value)
        elif e.kind == "C":
            stamp(Cn, e, e.value)
        elif e.kind == "L":
            k = circuit.inductors.index(e.name)
            Lm[k] = e.value
            if e.a in circuit.node_index:
                E[circuit.node_index[e.a], k] += 1.0
            if e.b in circuit.node_index:
                E[circuit.node_index[e.b], k] -= 1.0
        elif e.kind == "I":
            k = circuit.inputs.index(e.name)
            if e.a in circuit.node_index:
                Bs[circuit.node_index[e.a], k] -= 1.0
            if e.b in circuit.node_index:
                Bs[circuit.node_index[e.b], k] += 1.0
    d, a = slice(0, nd), slice(nd, n)
    Gaa = G[a, a]
    # algebraic node voltages: v_a = Pa_x [v_d; iL] + Pa_u u
    rhs = np.hstack([-G[a, d], -E[a], Bs[a]])
    sol = np.linalg.solve(Gaa, rhs) if n > nd else np.zeros((0, nd + nl + ni))
    Vx = np.zeros((n, nd + nl))
    Vu = np.zeros((n, ni))
    Vx[d, :nd] = np.eye(nd)
    Vx[a] = sol[:, : nd + nl]
    Vu[a] = sol[:, nd + nl :]
    nx = nd + nl
    A = np.zeros((nx, nx))
    B = np.zeros((nx, ni))
    Cdd = Cn[d, d]
    # C v_d' = -(G v + E iL - Bs u) restricted to dynamic rows, with v from Vx, Vu
    A[:nd] = -np.linalg.solve(Cdd, G[d] @ Vx + np.hstack([np.zeros((nd, nd)), E[d]]))
    B[:nd] = np.linalg.solve(Cdd, Bs[d] - G[d] @ Vu)
    live_l = np.array([name not in dead for name in circuit.inductors], dtype=bool)
    if nl:
        A[nd:] = (E.T @ Vx) / Lm[:, None].clip(min=1e-300)
        B[nd:] = (E.T @ Vu) / Lm[:, None].clip(min=1e-300)
        A[nd:][~live_l] = 0.0
        B[nd:][~live_l] = 0.0
    dead_ix = np.array([nd + k for k in range(nl) if not live_l[k]], dtype=int)
    # outputs
    rows_C, rows_D = [], []
    Vdot_x, Vdot_u = Vx @ A, Vx @ B
    for p in probes:
        cx, du = _probe_rows(circuit, p, cs, eff, dead, Vx, Vu, Vdot_x, Vdot_u)
        rows_C.append(p.scale * cx)
        rows_D.append(p.scale * du)
    nf = sum(len(p.poles_hz) for p in probes)
    At = np.zeros((nx + nf, nx + nf))
    At[:nx, :nx] = A
    Bt = np.vstack([B, np.zeros((nf, ni))])
    Ct = np.zeros((len(probes), nx + nf))
    Dt = np.zeros((len(probes), ni))
    filt_src: list = []
    k = nx
    for j, p in enumerate(probes):
        if not p.poles_hz:
            Ct[j, :nx], Dt[j] = rows_C[j], rows_D[j]
            continue
        for m, f in enumerate(p.poles_hz):
            w = 2 * np.pi * float(f)
            if m == 0:
                At[k, :nx] += w * rows_C[j]
                Bt[k] += w * rows_D[j]
                filt_src.append((rows_C[j], rows_D[j]))
            else:
                At[k, k - 1] += w
                filt_src.append((None, None))
            At[k, k] -= w
            k += 1
        Ct[j, k - 1] = 1.0
    return StateSpace(At, Bt, Ct, Dt, nx, dead_ix, filt_src, cond_limit)


def _probe_rows(circuit: Circuit, p, cs, eff, dead, Vx, Vu, Vdx, Vdu):
    """The C and D rows of output ``p``: node voltages from ``Vx``/``Vu``, a capacitor's
    current from the voltage derivatives ``Vdx``/``Vdu``, a resistor's from Ohm's law."""
    nx, ni = Vx.shape[1], Vu.shape[1]
    if p.kind == "v":
        cx, du = np.zeros(nx), np.zeros(ni)
        for node, s in ((p.a, 1.0), (p.b, -1.0)):
            if node is None or node == circuit.ground:
                continue
            if node not in circuit.node_index:
                raise ValueError(f"output v({node}): unknown node")
            cx += s * Vx[circuit.node_index[node]]
            du += s * Vu[circuit.node_index[node]]
        return cx, du
    e = circuit.element_by_name.get(p.a) or next((x for x in eff if x.name == p.a), None)
    if e is None:
        raise ValueError(f"output i({p.a}): unknown element")
    cx, du = np.zeros(nx), np.zeros(ni)
    if e.kind == "S" and e.name not in cs:
        return cx, du
    if e.kind == "L":
        if e.name not in dead:
            cx[len(circuit.dynamic_nodes) + circuit.inductors.index(e.name)] = 1.0
        return cx, du
    if e.kind == "I":
        du[circuit.inputs.index(e.name)] = 1.0
        return cx, du

    def diff(M):
        r = np.zeros(M.shape[1])
        if e.a in circuit.node_index:
            r += M[circuit.node_index[e.a]]
        if e.b in circuit.node_index:
            r -= M[circuit.node_index[e.b]]
        return r

    if e.kind == "C":
        return e.value * diff(Vdx), e.value * diff(Vdu)
    return diff(Vx) / e.value, diff(Vu) / e.value  # R or closed S
