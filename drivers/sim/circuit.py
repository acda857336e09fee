"""Exact transient solution of linear R, L, C networks with switches and current sources.

Method (modified nodal analysis reduced to state space):

* Node equations ``Cn v' + G v + E iL = Bs u`` and inductor equations ``L iL' = E^T v``.
  Nodes touched by a capacitor are *dynamic* (their voltages are states); the others are
  *algebraic* and are eliminated by a Schur complement of ``G``. States are therefore the
  dynamic node voltages (V), then the inductor currents (A), then any output-filter states.
* Within one switch configuration and constant inputs the solution is exact:
  ``x(t) = exp(A t) x0 + integral_0^t exp(A s) ds B u``, evaluated in the eigenbasis of
  ``A`` (with ``expm1(l t) / l`` for the forced part, so conserved charges with ``l = 0``
  are exact too), vectorised over all sample times. When the eigenvectors are
  ill-conditioned (near-defective ``A``) it falls back to ``scipy.linalg.expm`` of the
  augmented matrix with repeated multiplication over uniform sample grids.
* A closed switch is a resistance (the element's value), an open switch is absent.

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

import logging
import re
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field

import numpy as np
import scipy.linalg

from drivers.sim.netlist import Element, MeterNetlist

__all__ = ["GMIN_OHMS", "STRAY_FARADS", "Circuit", "Probe", "StateSpace", "Step", "Trace"]

log = logging.getLogger(__name__)

GMIN_OHMS = 1.0e12
STRAY_FARADS = 1.0e-12
#: Eigenvector condition number above which the expm fallback is used.
EIG_COND_LIMIT = 1.0e9

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


class StateSpace:
    """``x' = A x + B u``, ``y = C x + D u`` for one configuration, with exact evaluation.

    ``x`` has ``n_net`` network states followed by one state per output-filter pole.
    States listed in ``dead`` (inductors without a closed loop) are held at zero.
    """

    def __init__(self, A, B, C, D, n_net: int, dead: np.ndarray, filt_src: list) -> None:
        self.A, self.B, self.C, self.D = A, B, C, D
        self.n_net = n_net
        self.n_states = A.shape[0]
        self.dead = dead
        self._filt_src = filt_src  # per filter state: (probe row of C0/D0 or previous state)
        self.live = np.setdiff1d(np.arange(self.n_states), dead)
        Al = A[np.ix_(self.live, self.live)]
        self._Al, self._Bl = Al, B[self.live]
        lam, V = np.linalg.eig(Al) if Al.size else (np.zeros(0), np.zeros((0, 0)))
        cond = np.linalg.cond(V) if Al.size else 1.0
        self.eig_ok = bool(np.isfinite(cond) and cond < EIG_COND_LIMIT)
        if self.eig_ok:
            self._lam, self._V, self._Vi = lam, V, np.linalg.inv(V)
        else:
            log.debug("eigenvectors ill-conditioned (cond %.3g): expm fallback", cond)
        self._nonsingular = bool(Al.size) and bool(np.all(lam != 0))
        self._expm_cache: dict[float, tuple[np.ndarray, np.ndarray]] = {}

    def eigenvalues(self) -> np.ndarray:
        """Eigenvalues of the live part of ``A`` (1/s)."""
        if self.eig_ok:
            return self._lam
        return np.linalg.eigvals(self._Al)

    def settle(self, x_net: np.ndarray, u: np.ndarray) -> np.ndarray:
        """Full state whose filter states equal their inputs' present values (steady filters)."""
        x = np.zeros(self.n_states)
        x[: self.n_net] = x_net
        for k, (row_C, row_D) in enumerate(self._filt_src):
            if row_C is None:  # a later pole of a cascade: equal to the previous pole
                x[self.n_net + k] = x[self.n_net + k - 1]
            else:
                x[self.n_net + k] = row_C @ x[: self.n_net] + row_D @ u
        return x

    def advance(self, x0: np.ndarray, u: np.ndarray, dt: float) -> np.ndarray:
        """Full state after ``dt`` seconds from ``x0`` with inputs ``u``."""
        x = np.zeros(self.n_states)
        xl = x0[self.live]
        if dt <= 0 or not len(xl):
            x[self.live] = xl
            return x
        if self.eig_ok:
            xs, z0, w = self._modal(xl, u)
            x[self.live] = xs + _eig_eval(self._lam, self._V, z0, w, np.array([dt]))[:, 0]
        else:
            Phi, Gam = self._phi(dt)
            x[self.live] = Phi @ xl + Gam @ u
        return x

    def outputs(self, x0: np.ndarray, u: np.ndarray, t: np.ndarray) -> np.ndarray:
        """Outputs at times ``t`` (s, relative to the state ``x0``, all >= 0): (n_out, len(t))."""
        t = np.asarray(t, dtype=float)
        n_out = self.C.shape[0]
        if t.size == 0:
            return np.zeros((n_out, 0))
        order = None
        if np.any(np.diff(t) < 0):
            order = np.argsort(t, kind="stable")
            t = t[order]
        xl = x0[self.live]
        Cl = self.C[:, self.live]
        y = (self.D @ u)[:, None] + np.zeros((n_out, t.size))
        if len(xl):
            if self.eig_ok:
                xs, z0, w = self._modal(xl, u)
                y += (Cl @ xs)[:, None] + _eig_eval(self._lam, Cl @ self._V, z0, w, t)
            else:
                y += Cl @ self._propagate(xl, u, t)
        if order is not None:
            out = np.empty_like(y)
            out[:, order] = y
            return out
        return y

    def _modal(self, xl: np.ndarray, u: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """(x_ss, z0, w): the solution is ``x_ss + V (exp(L t) z0 + expm1(L t)/L w)``.

        With a nonsingular ``A`` the forced part is the steady state ``x_ss = -A^-1 B u``
        from a direct solve and ``w = 0``: projecting ``B u`` on the eigenbasis instead would
        multiply its rounding error by ``t`` in the slowest modes (seconds against
        nanoseconds). A singular ``A`` (a conserved charge) keeps the ``expm1`` form.
        """
        bu = self._Bl @ u
        if not np.any(bu):
            return np.zeros_like(xl), self._Vi @ xl, np.zeros_like(xl, dtype=complex)
        if self._nonsingular:
            xs = np.linalg.solve(self._Al, -bu)
            if np.all(np.isfinite(xs)):
                return xs, self._Vi @ (xl - xs), np.zeros_like(xl, dtype=complex)
        return np.zeros_like(xl), self._Vi @ xl, self._Vi @ bu

    # -- expm fallback -------------------------------------------------------------------
    def _phi(self, dt: float) -> tuple[np.ndarray, np.ndarray]:
        key = float(dt)
        hit = self._expm_cache.get(key)
        if hit is None:
            n, m = self._Al.shape[0], self._Bl.shape[1]
            M = np.zeros((n + m, n + m))
            M[:n, :n], M[:n, n:] = self._Al * dt, self._Bl * dt
            E = scipy.linalg.expm(M)
            hit = (E[:n, :n], E[:n, n:])
            if len(self._expm_cache) < 4096:
                self._expm_cache[key] = hit
        return hit

    def _propagate(self, xl: np.ndarray, u: np.ndarray, t: np.ndarray) -> np.ndarray:
        """States at sorted times ``t`` by exact steps; uniform runs use matrix powers."""
        X = np.empty((len(xl), t.size))
        x = xl.copy()
        if t[0] > 0:
            Phi, Gam = self._phi(t[0])
            x = Phi @ x + Gam @ u
        dts = np.diff(t)
        X[:, 0] = x
        if not dts.size:
            return X
        # runs of equal steps (uniform grids are one run): boundaries found once, vectorised
        change = np.abs(np.diff(dts)) > 1e-9 * np.maximum(dts[1:], 1e-30)
        bounds = np.concatenate([[0], np.nonzero(change)[0] + 1, [dts.size]])
        for r0, r1 in zip(bounds[:-1], bounds[1:], strict=True):
            j, run, h = int(r0) + 1, int(r1 - r0), float(dts[r0])
            Phi, Gam = self._phi(h)
            g = Gam @ u
            blk = min(run, 512)
            P = np.empty((blk, len(x), len(x)))
            q = np.empty((blk, len(x)))
            P[0], q[0] = Phi, g
            for k in range(1, blk):
                P[k], q[k] = Phi @ P[k - 1], Phi @ q[k - 1] + g
            done = 0
            while done < run:
                n = min(blk, run - done)
                chunk = P[:n] @ x + q[:n]
                X[:, j + done : j + done + n] = chunk.T
                x = chunk[-1]
                done += n
        return X


def _eig_eval(lam, CV, z0, w, t) -> np.ndarray:
    """``Re sum_i CV[:, i] (exp(l_i t) z0_i + expm1(l_i t)/l_i w_i)`` at sorted times ``t``.

    Conjugate pairs are evaluated once (weight 2); modes that have decayed below 1e-18 are
    only evaluated on the prefix of ``t`` where they still matter.
    """
    out = np.zeros((CV.shape[0], t.size))
    tmax = t[-1]
    for i, li in enumerate(lam):
        if li.imag < 0:
            continue
        wgt = 2.0 if li.imag > 0 else 1.0
        c = CV[:, i]
        if not np.any(c) or (z0[i] == 0 and w[i] == 0):
            continue
        lr = li.real
        if abs(li) * tmax > 1e-2:
            # exp(l t) (z0 + w/l) - w/l; the constant part applies at every time
            cut = t.size
            if lr < 0:
                cut = int(np.searchsorted(t, 41.5 / -lr, side="right"))
            a = z0[i] + w[i] / li
            if cut:
                e = np.exp(li * t[:cut]) if li.imag else np.exp(lr * t[:cut])
                out[:, :cut] += wgt * np.real(np.outer(c * a, e))
            out -= wgt * np.real(c * (w[i] / li))[:, None]
        else:
            if li == 0:
                psi = t
            else:
                psi = np.expm1(li * t) / li if li.imag else np.expm1(lr * t) / lr
            e = np.exp(li * t) if li.imag else np.exp(lr * t)
            out += wgt * np.real(np.outer(c * z0[i], e) + np.outer(c * w[i], psi))
    return out


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
        self._by_name = {e.name: e for e in self.elements}
        nodes = sorted({n for e in self.elements for n in (e.a, e.b)} - {ground})
        self._strays = self._stray_elements(nodes)
        caps = [e for e in self.elements if e.kind == "C"] + self._strays
        dyn = {n for e in caps for n in (e.a, e.b)} - {ground}
        self.dynamic_nodes = tuple(n for n in nodes if n in dyn)
        self.algebraic_nodes = tuple(n for n in nodes if n not in dyn)
        self.nodes = self.dynamic_nodes + self.algebraic_nodes
        self._ix = {n: k for k, n in enumerate(self.nodes)}
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
            ss = self._build(cs, probes)
            self._cache[key] = ss
        return ss

    def _build(self, cs: frozenset[str], probes: tuple[Probe, ...]) -> StateSpace:
        n, nl, ni = len(self.nodes), len(self.inductors), len(self.inputs)
        nd = len(self.dynamic_nodes)
        eff = self.effective_elements(cs)
        dead = self.dead_inductors(cs)
        Cn, G = np.zeros((n, n)), np.zeros((n, n))
        E, Bs = np.zeros((n, nl)), np.zeros((n, ni))
        Lm = np.zeros(nl)

        def stamp(M, e, val):
            ia, ib = self._ix.get(e.a), self._ix.get(e.b)
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
                k = self.inductors.index(e.name)
                Lm[k] = e.value
                if e.a in self._ix:
                    E[self._ix[e.a], k] += 1.0
                if e.b in self._ix:
                    E[self._ix[e.b], k] -= 1.0
            elif e.kind == "I":
                k = self.inputs.index(e.name)
                if e.a in self._ix:
                    Bs[self._ix[e.a], k] -= 1.0
                if e.b in self._ix:
                    Bs[self._ix[e.b], k] += 1.0
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
        live_l = np.array([name not in dead for name in self.inductors], dtype=bool)
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
            cx, du = self._probe_rows(p, cs, eff, dead, Vx, Vu, Vdot_x, Vdot_u)
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
        return StateSpace(At, Bt, Ct, Dt, nx, dead_ix, filt_src)

    def _probe_rows(self, p, cs, eff, dead, Vx, Vu, Vdx, Vdu):
        nx, ni = Vx.shape[1], Vu.shape[1]
        if p.kind == "v":
            cx, du = np.zeros(nx), np.zeros(ni)
            for node, s in ((p.a, 1.0), (p.b, -1.0)):
                if node is None or node == self.ground:
                    continue
                if node not in self._ix:
                    raise ValueError(f"output v({node}): unknown node")
                cx += s * Vx[self._ix[node]]
                du += s * Vu[self._ix[node]]
            return cx, du
        e = self._by_name.get(p.a) or next((x for x in eff if x.name == p.a), None)
        if e is None:
            raise ValueError(f"output i({p.a}): unknown element")
        cx, du = np.zeros(nx), np.zeros(ni)
        if e.kind == "S" and e.name not in cs:
            return cx, du
        if e.kind == "L":
            if e.name not in dead:
                cx[len(self.dynamic_nodes) + self.inductors.index(e.name)] = 1.0
            return cx, du
        if e.kind == "I":
            du[self.inputs.index(e.name)] = 1.0
            return cx, du

        def diff(M):
            r = np.zeros(M.shape[1])
            if e.a in self._ix:
                r += M[self._ix[e.a]]
            if e.b in self._ix:
                r -= M[self._ix[e.b]]
            return r

        if e.kind == "C":
            return e.value * diff(Vdx), e.value * diff(Vdu)
        return diff(Vx) / e.value, diff(Vu) / e.value  # R or closed S

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
            w = np.abs(ss.C[0, ss.live] @ ss._V)
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
    parent = {n: n for n in nodes}

    def find(n: str) -> str:
        while parent[n] != n:
            parent[n] = parent[parent[n]]
            n = parent[n]
        return n

    for e in edges:
        parent.setdefault(e.a, e.a)
        parent.setdefault(e.b, e.b)
        ra, rb = find(e.a), find(e.b)
        if ra != rb:
            parent[ra] = rb
    groups: dict[str, set[str]] = {}
    for n in parent:
        groups.setdefault(find(n), set()).add(n)
    return list(groups.values())


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
