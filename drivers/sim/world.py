"""The simulated bench world: the bench network around the meter, solved exactly in time.

Network (ground = the meter's COM node)::

    bench:supply (current source) -> bench:sup, with switch bench:supply_cv (= R_out) to COM
    bench:sup --R_charge-- bench:chg --K<charge>-- VIN
    VIN --K<discharge>-- bench:dis --[K<ch>:load<i>]--R_load--[L_load]-- bench:sense
    bench:sense --R_shunt-- COM  (sense kind "shunt"; kind "probe": loads return to COM)
    VIN --K<bleed>-- bench:bl --R_bleed-- COM
    VIN --R_divider-- COM        (when a divider probe is fitted; it loads the input)

Supply: constant voltage behind ``supply_output_ohms`` (Norton form: a current source
``V/R_out`` with ``R_out`` to COM). Output off is 0 V behind ``R_out`` (the supply's own
bleeder). Current limit: at every switching instant the world computes the current the CV
source would deliver; above the limit the supply becomes an ideal current source at the
limit (CC), and the instant the terminal voltage reaches ``V - I_lim R_out`` (found on the
exact solution) it returns to CV. The limit applies to sourced current only; the limit is
not re-checked inside a CV segment.

Relays close with contact bounce (:class:`~drivers.sim.interfaces.BounceSpec`): a make, then
0..max_bounces break/make pairs, every interval uniform in [min_s, max_s], drawn from a
numpy Generator seeded with ``config.seed``. Opening is immediate; a contact that breaks a
current arcs (:mod:`drivers.sim.arcs`). A channel listed in
``faults.relay_stuck_closed`` welds on its first closing and never opens again.
``faults.relay_stuck_open`` never makes contact; ``faults.supply_trip_amps``: the output
trips off (and reads back off) when it would source more than that. ``faults.supply_stuck_on``: once on, OUTP OFF is ignored and the output keeps the voltage it
had (later voltage changes are ignored until the output is commanded on again).

Time: the world advances lazily to ``clock.now()`` whenever something is asked or changed.
It keeps the segments (intervals between switching instants) of the last
``horizon_s`` seconds (default 60 s, at most ``max_segments``); ``scope_inputs`` can
evaluate any time since the start of the oldest kept segment (and, until the first segment
is dropped, times before the world was created, which read the initial quiet state). Scope bandwidth poles are
extra exact states, carried across segments from the oldest kept segment (settled there).
"""

from __future__ import annotations

import bisect
import heapq
import logging
import threading
from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np
from scipy.optimize import brentq

from drivers.clock import Clock
from drivers.sim.arcs import ContactArcs
from drivers.sim.circuit import Circuit, Probe, StateSpace
from drivers.sim.interfaces import WorldConfig
from drivers.sim.netlist import Element, MeterNetlist, load_netlist
from drivers.sim.nonlinear import NonlinearCircuit, load_elements
from rigbase.errors import LimitError
from rigbase.loadfile import read_load

__all__ = ["BenchWorld"]

log = logging.getLogger(__name__)

_SUP, _SRC, _CV = "bench:sup", "bench:supply", "bench:supply_cv"


@dataclass
class _Segment:
    t0: float
    circuit: Circuit
    closed: frozenset[str]
    u: np.ndarray
    x0: np.ndarray  # network state at t0
    cc: bool
    filt: dict = field(default_factory=dict)  # probe key -> full state (net + filters) at t0


class BenchWorld(ContactArcs):
    """The bench of DESIGN.md around one meter netlist; implements ``World``."""

    def __init__(
        self,
        config: WorldConfig,
        clock: Clock,
        horizon_s: float = 60.0,
        max_segments: int = 20000,
    ) -> None:
        self.clock = clock
        self.config = config
        self.horizon_s = float(horizon_s)
        self.max_segments = int(max_segments)
        self._lock = threading.RLock()
        self._rng = np.random.default_rng(config.seed)
        w = config.wiring
        self._chan_switch: dict[str, int] = {
            f"K{w.charge_channel}": w.charge_channel,
            f"K{w.discharge_channel}": w.discharge_channel,
            f"K{w.bleed_channel}": w.bleed_channel,
        }
        for i, ld in enumerate(w.loads):
            if ld.channel is not None:
                self._chan_switch[f"K{ld.channel}:load{i}"] = ld.channel
        self._coil: dict[int, bool] = {ch: False for ch in self._chan_switch.values()}
        self._arcs: dict[str, float] = {}  # arcing contact -> its voltage, signed with i
        self.arc_joules = 0.0  # energy delivered into contact arcs so far (ground truth)
        self._contact: dict[int, bool] = dict(self._coil)
        self._gen: dict[int, int] = {}
        self._welded: set[int] = set()
        self.tripped = False  # faults.supply_trip_amps fired (the output reads back off)
        self._events: list[tuple[float, int, int, int, bool]] = []  # t, seq, ch, gen, state
        self._seq = 0
        self._volts, self._amps = 0.0, float(config.supply_max_amps)
        self._out_cmd, self._out_phys, self._latched_volts = False, False, 0.0
        self._netlist = load_netlist(config.meter_model)
        self._mode = self._netlist.modes[0]
        self._circuit = self._bench_circuit(self._netlist)
        t0 = clock.now()
        self._segments: list[_Segment] = []
        self._pruned = False
        self._switch_times: list[float] = []
        self._history: list[tuple[float, dict[str, object]]] = []
        self._start_segment(t0, self._circuit.state_vector())
        self._record(t0)

    @property
    def netlist(self) -> MeterNetlist:
        """The connected meter's netlist (ground truth for tests)."""
        with self._lock:
            return self._netlist

    @property
    def circuit(self) -> Circuit:
        """The present bench circuit (meter plus bench parts), e.g. for ``time_constants``."""
        with self._lock:
            return self._circuit

    # -- construction ------------------------------------------------------------------------
    def _bench_circuit(self, net: MeterNetlist) -> Circuit:
        w, cfg = self.config.wiring, self.config
        vin, com = net.input, net.common
        r_k = cfg.bounce.contact_ohms
        el = [
            Element(_SRC, "I", com, _SUP),
            Element(_CV, "S", _SUP, com, w.supply_output_ohms),
            Element("bench:R_charge", "R", _SUP, "bench:chg", w.charge_ohms),
            Element(f"K{w.charge_channel}", "S", "bench:chg", vin, r_k),
            Element(f"K{w.discharge_channel}", "S", vin, "bench:dis", r_k),
            Element(f"K{w.bleed_channel}", "S", vin, "bench:bl", r_k),
            Element("bench:R_bleed", "R", "bench:bl", com, w.bleed_ohms),
        ]
        ret = "bench:sense" if w.sense.kind == "shunt" else com
        juncs: list = []
        consts: dict[str, float] = {}
        if w.sense.kind == "shunt":
            el.append(Element("bench:R_shunt", "R", "bench:sense", com, w.sense.ohms))
        for i, ld in enumerate(w.loads):
            top = "bench:dis"
            if ld.channel is not None:
                top = f"bench:load{i}"
                el.append(Element(f"K{ld.channel}:load{i}", "S", "bench:dis", top, r_k))
            end = f"bench:load{i}M" if ld.model else ret  # a load file sits after R and L
            if ld.henry > 0:
                el.append(Element(f"bench:R_load{i}", "R", top, f"bench:load{i}L", ld.ohms))
                el.append(Element(f"bench:L_load{i}", "L", f"bench:load{i}L", end, ld.henry))
            else:
                el.append(Element(f"bench:R_load{i}", "R", top, end, ld.ohms))
            if ld.model:
                lel, lj, lc = load_elements(read_load(ld.model), end, ret, f"bench:load{i}:")
                el, juncs, consts = el + lel, juncs + lj, {**consts, **lc}
        if w.divider_ratio is not None:
            el.append(Element("bench:R_divider", "R", vin, com, w.divider_ohms))
        # an arc source across every relay contact (0 A unless that contact arcs)
        el += [Element(f"arc:{e.name}", "I", e.a, e.b) for e in el if e.name in self._chan_switch]
        clash = {e.name for e in el} & {e.name for e in net.elements}
        if clash:
            raise ValueError(f"{net.path}: element names clash with the bench: {sorted(clash)}")
        if juncs:  # a nonlinear load: segments integrated (drivers.sim.nonlinear)
            return NonlinearCircuit(tuple(net.elements) + tuple(el), juncs, consts, com)
        return Circuit.from_netlist(net, el)

    def _probes(self, bandwidth_hz: Sequence[float | None]) -> tuple[Probe, ...]:
        w, net = self.config.wiring, self._netlist
        out = []
        for k, bw in enumerate(bandwidth_hz[:2]):
            poles: tuple[float, ...] = () if bw is None else (float(bw),)
            if k == 0 and w.sense.kind == "shunt":
                out.append(Probe("v", "bench:sense", None, 1.0, poles))
            elif k == 0:
                pre = () if w.sense.bandwidth_hz is None else (float(w.sense.bandwidth_hz),)
                scale = 1.0 / w.sense.amps_per_volt
                out.append(Probe("i", f"K{w.discharge_channel}", None, scale, pre + poles))
            elif w.divider_ratio is not None:
                out.append(Probe("v", net.input, None, 1.0 / w.divider_ratio, poles))
        return tuple(out)

    # -- configuration of the present instant --------------------------------------------------
    def _closed(self, cc: bool) -> frozenset[str]:
        s = {name for name, ch in self._chan_switch.items() if self._contact.get(ch)}
        s |= set(self._arcs)  # an arcing contact still conducts
        s |= self._netlist.closed_switches(self._mode)
        if not cc:
            s.add(_CV)
        return frozenset(s)

    def _source_volts(self) -> float:
        if not self._out_phys:
            return 0.0
        return self._volts if self._out_cmd else self._latched_volts

    def _start_segment(self, t: float, x_net: np.ndarray) -> None:
        c, r_out = self._circuit, self.config.wiring.supply_output_ohms
        v = self._source_volts()
        arcs = {f"arc:{n}": -vs / self.config.bounce.contact_ohms for n, vs in self._arcs.items()}
        closed, u = self._closed(False), c.input_vector({_SRC: v / r_out, **arcs})
        cc = False
        if v > 0:
            ss = c.model(closed, [f"v({_SUP})"])
            x = x_net.copy()
            x[ss.dead] = 0.0
            v_sup = float(ss.outputs(x, u, np.zeros(1))[0, 0])
            trip = self.config.faults.supply_trip_amps
            if trip is not None and (v - v_sup) / r_out > trip:
                log.info("fault: supply trips off at %.3g A", (v - v_sup) / r_out)
                self.tripped, self._out_phys, self._out_cmd = True, False, False
                u = c.input_vector({_SRC: 0.0})
            elif (v - v_sup) / r_out > self._amps * (1 + 1e-6):
                cc = True
                closed, u = self._closed(True), c.input_vector({_SRC: self._amps, **arcs})
        ss = c.model(closed)
        x = np.array(x_net, dtype=float)
        x[ss.dead] = 0.0
        self._segments.append(_Segment(t, c, closed, u, x, cc))
        self._switch_times.append(t)
        self._prune(t)

    def _prune(self, now: float) -> None:
        segs = self._segments
        keep_from = 0
        while keep_from < len(segs) - 2 and (
            segs[keep_from + 1].t0 < now - self.horizon_s
            or len(segs) - keep_from > self.max_segments
        ):
            keep_from += 1
        if keep_from:
            del segs[:keep_from]
            self._pruned = True

    def _state_at(self, t: float) -> np.ndarray:
        seg = self._segments[-1]
        return seg.circuit.model(seg.closed).advance(seg.x0, seg.u, t - seg.t0)

    def _split(self, t: float) -> None:
        """End the present segment at ``t`` and start one for the present configuration."""
        seg = self._segments[-1]
        if self._arc_segment(seg):
            self.arc_joules += self._arc_energy(seg, t)
        self._start_segment(t, self._state_at(t))

    # -- time --------------------------------------------------------------------------------
    def _advance(self, t_target: float) -> None:
        while True:
            nxt = self._events[0][0] if self._events else None
            if nxt is not None and nxt > t_target:
                nxt = None
            seg = self._segments[-1]
            if seg.cc:
                tc = self._cc_exit(seg, nxt if nxt is not None else t_target)
                if tc is not None:
                    self._split(tc)
                    continue
            if self._arcs:
                hit = self._arc_exit(seg, nxt if nxt is not None else t_target)
                if hit is not None:
                    self._arcs.pop(hit[1])  # current zero: the arc goes out, the contact opens
                    self._split(max(hit[0], seg.t0))
                    continue
            if nxt is None:
                return
            changed = False
            while self._events and self._events[0][0] == nxt:
                _, _, ch, gen, state = heapq.heappop(self._events)
                if self._gen.get(ch, 0) == gen and self._contact.get(ch) != state:
                    self._start_arcs(ch, state, nxt)
                    self._contact[ch] = state
                    changed = True
                    self._record(nxt)
            if changed:
                self._split(nxt)

    def _cc_exit(self, seg: _Segment, t_limit: float) -> float | None:
        """Instant in (t0, t_limit] where the CC supply's terminal reaches V - I R_out."""
        span = t_limit - seg.t0
        if span <= 0:
            return None
        th = self._source_volts() - self._amps * self.config.wiring.supply_output_ohms
        ss = seg.circuit.model(seg.closed, [f"v({_SUP})"])
        grid = np.concatenate([[0.0], np.geomspace(min(1e-9, span), span, 400)])
        v = ss.outputs(seg.x0, seg.u, grid)[0]
        hit = np.nonzero(v >= th)[0]
        if not hit.size or hit[0] == 0:
            return None
        k = hit[0]
        tc = brentq(
            lambda s: float(ss.outputs(seg.x0, seg.u, np.array([s]))[0, 0]) - th,
            grid[k - 1],
            grid[k],
            xtol=1e-15,
        )
        return seg.t0 + tc

    def _now(self) -> float:
        t = self.clock.now()
        self._advance(t)
        return t

    def _record(self, t: float) -> None:
        self._history.append(
            (
                t,
                {
                    "relays": dict(sorted(self._contact.items())),
                    "supply_on": self._out_phys,
                    "supply_volts": self._source_volts(),
                    "mode": self._mode,
                    "meter": self._netlist.model,
                },
            )
        )

    def _change(self, t: float) -> None:
        self._record(t)
        self._split(t)

    # -- supply ------------------------------------------------------------------------------
    def supply_program(
        self, volts: float | None = None, amps: float | None = None, output: bool | None = None
    ) -> None:
        """Change setpoint (V), current limit (A) and/or output state from now on."""
        cfg = self.config
        with self._lock:
            if volts is not None and not 0.0 <= volts <= cfg.supply_max_volts:
                raise LimitError(f"supply volts {volts} outside 0..{cfg.supply_max_volts} V")
            if amps is not None and not 0.0 <= amps <= cfg.supply_max_amps:
                raise LimitError(f"supply amps {amps} outside 0..{cfg.supply_max_amps} A")
            t = self._now()
            if output is False and self._out_cmd and cfg.faults.supply_stuck_on:
                self._latched_volts = self._volts
            if volts is not None:
                self._volts = float(volts)
            if amps is not None:
                self._amps = float(amps)
            if output is not None:
                self._out_cmd = bool(output)
                self._out_phys = bool(output) or (cfg.faults.supply_stuck_on and self._out_phys)
            self._change(t)

    def supply_measure(self) -> tuple[float, float]:
        """(terminal volts, output amps) now."""
        with self._lock:
            t = self._now()
            seg = self._segments[-1]
            ss = seg.circuit.model(seg.closed, [f"v({_SUP})"])
            v = float(ss.outputs(seg.x0, seg.u, np.array([t - seg.t0]))[0, 0])
            if seg.cc:
                return v, self._amps
            r = self.config.wiring.supply_output_ohms
            return v, self._source_volts() / r - v / r

    # -- relays ------------------------------------------------------------------------------
    def relay_set(self, channels: Sequence[int], closed: bool) -> None:
        """Command relay coils now; closing contacts bounce per ``config.bounce``."""
        b = self.config.bounce
        with self._lock:
            t = self._now()
            for ch in channels:
                ch = int(ch)
                was = self._coil.get(ch, False)
                self._coil[ch] = bool(closed)
                self._contact.setdefault(ch, False)
                if closed and ch in self.config.faults.relay_stuck_open:
                    continue  # the coil pulls, the contact never makes
                if closed and not was:
                    if ch in self.config.faults.relay_stuck_closed:
                        self._welded.add(ch)
                    gen = self._gen.get(ch, 0) + 1
                    self._gen[ch] = gen
                    n = int(self._rng.integers(0, b.max_bounces + 1))
                    iv = self._rng.uniform(b.min_s, b.max_s, size=2 * n)
                    times = t + np.concatenate([[0.0], np.cumsum(iv)])
                    for k, te in enumerate(times):
                        self._push(float(te), ch, gen, k % 2 == 0)
                elif not closed and ch not in self._welded:
                    self._gen[ch] = self._gen.get(ch, 0) + 1  # cancels pending bounce
                    self._push(t, ch, self._gen[ch], False)
            self._advance(t)

    def _push(self, t: float, ch: int, gen: int, state: bool) -> None:
        self._seq += 1
        heapq.heappush(self._events, (t, self._seq, ch, gen, state))

    def relay_commanded(self, channels: Sequence[int]) -> list[bool]:
        """Coil state of each channel as last commanded."""
        with self._lock:
            return [self._coil.get(int(ch), False) for ch in channels]

    # -- meter -------------------------------------------------------------------------------
    def meter_modes(self) -> tuple[str, ...]:
        with self._lock:
            return self._netlist.modes

    def meter_mode(self) -> str:
        with self._lock:
            return self._mode

    def meter_set_mode(self, mode: str) -> None:
        """Turn the dial; unknown mode -> ValueError."""
        with self._lock:
            if mode not in self._netlist.modes:
                raise ValueError(
                    f"meter {self._netlist.model!r} has no mode {mode!r} "
                    f"(modes: {', '.join(self._netlist.modes)})"
                )
            t = self._now()
            if mode != self._mode:
                self._mode = mode
                self._change(t)

    def meter_connect(self, meter_model: str) -> None:
        """Swap the meter for the netlist at ``meter_model``; its input starts discharged."""
        with self._lock:
            net = load_netlist(meter_model)
            t = self._now()
            old_c, x_old = self._circuit, self._state_at(t)
            circuit = self._bench_circuit(net)
            keep = {s: x for s, x in zip(old_c.states, x_old, strict=True) if "bench:" in s}
            self._netlist, self._circuit, self._mode = net, circuit, net.modes[0]
            self._record(t)
            self._start_segment(
                t, circuit.state_vector({k: v for k, v in keep.items() if k in circuit.states})
            )
            log.info("meter connected: %s (%s)", net.model, meter_model)

    def meter_input_volts(self) -> float:
        """Volts between the meter's V input and COM now."""
        with self._lock:
            t = self._now()
            seg = self._segments[-1]
            ss = seg.circuit.model(seg.closed, [f"v({self._netlist.input})"])
            return float(ss.outputs(seg.x0, seg.u, np.array([t - seg.t0]))[0, 0])

    # -- scope -------------------------------------------------------------------------------
    def scope_inputs(self, t: np.ndarray, bandwidth_hz: Sequence[float | None]) -> np.ndarray:
        """Volts at scope inputs 1..len(bandwidth_hz) at absolute times ``t`` (all <= now)."""
        with self._lock:
            now = self._now()
            t = np.asarray(t, dtype=float)
            out = np.zeros((len(bandwidth_hz), t.size))
            if t.size == 0:
                return out
            if t.max() > now + 1e-9:
                raise ValueError(f"scope_inputs: time {t.max()} is after now ({now})")
            segs = self._segments
            if t.min() < segs[0].t0 and self._pruned:
                raise ValueError(
                    f"scope_inputs: time {t.min()} is before the kept history ({segs[0].t0})"
                )
            probes = self._probes(bandwidth_hz)
            if not probes:
                return out
            starts = np.array([s.t0 for s in segs])
            # before the world existed: the initial (quiet, discharged) state held
            t = np.maximum(t, segs[0].t0)
            idx = np.searchsorted(starts, t, side="right") - 1
            first = int(idx.min())
            xf = self._filter_state(first, probes)
            # times in order (records, trigger windows): each segment's times are one slice,
            # found by bisection instead of a mask over all of them per segment
            ordered = bool(np.all(idx[1:] >= idx[:-1]))
            for k in range(first, int(idx.max()) + 1):
                seg = segs[k]
                ss = seg.circuit.model(seg.closed, probes)
                if ordered:
                    a, b = np.searchsorted(idx, (k, k + 1))
                    if b > a:
                        out[: len(probes), a:b] = ss.outputs(xf, seg.u, t[a:b] - seg.t0)
                else:
                    sel = idx == k
                    if np.any(sel):
                        out[: len(probes), sel] = ss.outputs(xf, seg.u, t[sel] - seg.t0)
                if k + 1 < len(segs):
                    xf = self._next_filter(k, ss, xf, probes)
            return out

    def _filter_state(self, k: int, probes: tuple[Probe, ...]) -> np.ndarray:
        """Full state (network + filter poles) at the start of kept segment ``k``."""
        segs = self._segments
        j = k
        while j > 0 and probes not in segs[j].filt:
            j -= 1
        if probes in segs[j].filt:
            xf = segs[j].filt[probes]
        else:  # oldest kept segment: filters settled on their input there
            s0 = segs[0]
            xf = s0.circuit.model(s0.closed, probes).settle(s0.x0, s0.u)
            s0.filt[probes] = xf
        for i in range(j, k):
            ss = segs[i].circuit.model(segs[i].closed, probes)
            xf = self._next_filter(i, ss, xf, probes)
        return xf

    def _next_filter(self, i: int, ss: StateSpace, xf: np.ndarray, probes: tuple) -> np.ndarray:
        segs = self._segments
        nxt = segs[i + 1]
        if probes in nxt.filt:
            return nxt.filt[probes]
        n_new = nxt.circuit.n_net
        if ss.n_states == ss.n_net:
            # probes without bandwidth poles carry no filter state across the switch: the
            # state there is the next segment's own network state, so advancing to its start
            # (an eigen-solution per segment, the residual readings' cost) is skipped
            x = nxt.x0.copy() if n_new else np.zeros(0)
            nxt.filt[probes] = x
            return x
        x_end = ss.advance(xf, segs[i].u, nxt.t0 - segs[i].t0)
        x = np.concatenate([nxt.x0, x_end[ss.n_net :]]) if n_new else x_end[ss.n_net :]
        nxt.filt[probes] = x
        return x

    def switching_times(self, t_from: float, t_to: float) -> list[float]:
        """Instants in [t_from, t_to] at which the network changed."""
        with self._lock:
            self._now()
            st = self._switch_times
            return st[bisect.bisect_left(st, t_from) : bisect.bisect_right(st, t_to)]

    def history(self) -> list[tuple[float, dict[str, object]]]:
        """Every change so far (relay contacts including bounce, supply, mode), time order."""
        with self._lock:
            self._now()
            return [(t, {**d, "relays": dict(d["relays"])}) for t, d in self._history]
