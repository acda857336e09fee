"""Test double for the SCPI-side tests: a World with one RC node, solved in closed form.

``SimpleRcWorld`` is NOT the bench physics (that is ``drivers/sim/world.py``). It exists so
the tests of the SCPI server, the simulated instruments and the trigger logic have a world
whose every answer is known exactly:

    supply (Vset, on/off) --R_out + R_charge--[ch charge]--+-- node v (capacitance C of the
                                                             |   meter in its mode, leakage R_leak)
                       load R_load + shunt --[ch discharge]-+
                                  R_bleed --[ch bleed]------+

Between switching instants the node relaxes as ``v(t) = v_inf + (v0 - v_inf) exp(-(t-t0)/tau)``
(first-order RC step response, any circuits textbook). Scope input 1 is the shunt voltage
``i_discharge * R_shunt``, input 2 the divider output ``v / ratio``, inputs 3 and 4 read 0.
Deliberate simplifications: no contact bounce, no current limit, no wiring inductance, and
the bandwidth limits are NOT modelled (they are recorded in ``bandwidth_requests`` so tests can
see what the scope asked for). Relay faults and ``supply_stuck_on`` are ignored.
"""

from __future__ import annotations

import threading
from collections.abc import Sequence

import numpy as np
import pyvisa

from drivers.clock import Clock, VirtualClock
from drivers.sim.interfaces import WorldConfig

__all__ = [
    "MODE_FARADS",
    "SimpleRcWorld",
    "drain_errors",
    "error_codes",
    "open_instrument",
    "query_raw_block",
]

# invented input capacitances per mode (test values only)
MODE_FARADS = {"AC V": 100e-9, "AC mV": 100e-9, "DC V": 1e-9, "DC mV": 1e-9, "Ohm": 1e-9}
LEAK_OHMS = 10e6


class SimpleRcWorld:
    """Single-RC closed-form World (test double; see the module docstring)."""

    def __init__(self, config: WorldConfig, clock: Clock, modes: Sequence[str] = ()) -> None:
        self.config = config
        self.clock = clock
        self._lock = threading.RLock()
        self._modes = tuple(modes) or tuple(MODE_FARADS)
        self._mode = self._modes[0]
        self._relays: dict[int, bool] = {}
        self._volts = 0.0
        self._amps = config.supply_max_amps
        self._on = False
        self.bandwidth_requests: list[tuple[float | None, ...]] = []
        t0 = clock.now()
        # segments: start time, start voltage, asymptote, rate (1/tau)
        self._starts: list[float] = [t0]
        self._v0: list[float] = [0.0]
        self._vinf: list[float] = [0.0]
        self._rate: list[float] = [self._g_total() / self._farads()]
        self._dis: list[bool] = [False]  # discharge relay closed during the segment
        self._history: list[tuple[float, dict[str, object]]] = [(t0, self._snapshot())]

    # -- circuit -------------------------------------------------------------------------------

    def _farads(self) -> float:
        return MODE_FARADS.get(self._mode, 1e-9)

    def _closed(self, ch: int) -> bool:
        return self._relays.get(ch, False)

    def discharge_ohms(self) -> float:
        """Load plus shunt resistance of the discharge path (ohm)."""
        w = self.config.wiring
        return w.loads[0].ohms + w.sense.ohms

    def _charge_g(self) -> float:
        w = self.config.wiring
        if self._on and self._closed(w.charge_channel):
            return 1.0 / (w.supply_output_ohms + w.charge_ohms)
        return 0.0

    def _g_total(self) -> float:
        w = self.config.wiring
        g = 1.0 / LEAK_OHMS + self._charge_g()
        if self._closed(w.discharge_channel):
            g += 1.0 / self.discharge_ohms()
        if self._closed(w.bleed_channel):
            g += 1.0 / w.bleed_ohms
        return g

    def _node(self, t: np.ndarray) -> np.ndarray:
        starts = np.asarray(self._starts)
        idx = np.clip(np.searchsorted(starts, t, side="right") - 1, 0, None)
        v0 = np.asarray(self._v0)[idx]
        vinf = np.asarray(self._vinf)[idx]
        rate = np.asarray(self._rate)[idx]
        dt = np.maximum(t - starts[idx], 0.0)
        return vinf + (v0 - vinf) * np.exp(-dt * rate)

    def _change(self) -> None:
        """Start a new segment now with the present switch and supply state."""
        now = self.clock.now()
        v_now = float(self._node(np.array([now]))[0])
        g = self._g_total()
        vinf = self._volts * self._charge_g() / g
        if self._starts[-1] == now:  # several changes at one instant: keep the last
            for seq in (self._starts, self._v0, self._vinf, self._rate, self._dis):
                seq.pop()
        self._starts.append(now)
        self._v0.append(v_now)
        self._vinf.append(vinf)
        self._rate.append(g / self._farads())
        self._dis.append(self._closed(self.config.wiring.discharge_channel))
        self._history.append((now, self._snapshot()))

    def _snapshot(self) -> dict[str, object]:
        return {
            "relays": dict(self._relays),
            "supply_on": self._on,
            "supply_volts": self._volts,
            "mode": self._mode,
        }

    # -- World protocol ------------------------------------------------------------------------

    def supply_program(
        self, volts: float | None = None, amps: float | None = None, output: bool | None = None
    ) -> None:
        with self._lock:
            if volts is not None:
                self._volts = float(volts)
            if amps is not None:
                self._amps = float(amps)
            if output is not None:
                self._on = bool(output)
            self._change()

    def supply_measure(self) -> tuple[float, float]:
        with self._lock:
            if not self._on:
                return 0.0, 0.0
            w = self.config.wiring
            amps = 0.0
            if self._closed(w.charge_channel):
                v = float(self._node(np.array([self.clock.now()]))[0])
                amps = (self._volts - v) / (w.supply_output_ohms + w.charge_ohms)
            return self._volts - amps * w.supply_output_ohms, amps

    def relay_set(self, channels: Sequence[int], closed: bool) -> None:
        with self._lock:
            for ch in channels:
                self._relays[int(ch)] = bool(closed)
            self._change()

    def relay_commanded(self, channels: Sequence[int]) -> list[bool]:
        with self._lock:
            return [self._closed(int(ch)) for ch in channels]

    def meter_modes(self) -> tuple[str, ...]:
        return self._modes

    def meter_set_mode(self, mode: str) -> None:
        with self._lock:
            if mode not in self._modes:
                raise ValueError(f"unknown meter mode {mode!r}")
            self._mode = mode
            self._change()

    def meter_mode(self) -> str:
        with self._lock:
            return self._mode

    def meter_connect(self, meter_model: str) -> None:
        with self._lock:
            self._mode = self._modes[0]
            self._change()
            self._v0[-1] = 0.0

    def scope_inputs(self, t: np.ndarray, bandwidth_hz: Sequence[float | None]) -> np.ndarray:
        with self._lock:
            self.bandwidth_requests.append(tuple(bandwidth_hz))
            t = np.asarray(t, dtype=np.float64)
            out = np.zeros((len(bandwidth_hz), t.size))
            if not len(bandwidth_hz):
                return out
            v = self._node(t)
            w = self.config.wiring
            starts = np.asarray(self._starts)
            idx = np.clip(np.searchsorted(starts, t, side="right") - 1, 0, None)
            closed = np.asarray(self._dis)[idx]
            out[0] = np.where(closed, v / self.discharge_ohms() * w.sense.ohms, 0.0)
            if len(bandwidth_hz) > 1 and w.divider_ratio:
                out[1] = v / w.divider_ratio
            return out

    def switching_times(self, t_from: float, t_to: float) -> list[float]:
        with self._lock:
            return [s for s in self._starts[1:] if t_from <= s <= t_to]

    def meter_input_volts(self) -> float:
        with self._lock:
            return float(self._node(np.array([self.clock.now()]))[0])

    def history(self) -> list[tuple[float, dict[str, object]]]:
        with self._lock:
            return list(self._history)

    # -- closed form for the tests -------------------------------------------------------------

    def tau_discharge(self) -> float:
        """Time constant of the discharge path in the current mode (s)."""
        g = 1.0 / LEAK_OHMS + 1.0 / self.discharge_ohms()
        return self._farads() / g

    def rc(self) -> float:
        """R*C of the load path alone (s), for reference checks."""
        return self.discharge_ohms() * self._farads()

    def time_constant(self) -> float:
        """Time constant of the present segment (s)."""
        with self._lock:
            return 1.0 / self._rate[-1]

    @staticmethod
    def exp_decay(v0: float, tau: float, t: np.ndarray) -> np.ndarray:
        """``v0 exp(-t/tau)``; RC discharge, any circuits textbook."""
        return v0 * np.exp(-np.asarray(t) / tau)


# -- pyvisa helpers for the integration tests ---------------------------------------------------

TIMEOUT_MS = 5000


def open_instrument(rm: pyvisa.ResourceManager, resource: str, timeout_ms: int = TIMEOUT_MS):
    """Open a raw-socket resource the way the drivers do (LF both ways, PYVISA-NOTES.md)."""
    inst = rm.open_resource(resource, read_termination="\n", write_termination="\n")
    inst.timeout = timeout_ms
    return inst


def query_raw_block(inst, command: str) -> bytes:
    """Send ``command`` and return its whole reply (block header, payload and LF) as bytes.

    Reads the header, then one counted read with the read termination off (PYVISA-NOTES.md:
    the stock block reader stops at every LF inside the payload).
    """
    inst.write(command)
    head = bytes(inst.read_bytes(2))
    if head[:1] != b"#":
        raise AssertionError(f"not a block: {head!r}")
    digits = bytes(inst.read_bytes(int(head[1:2])))
    saved = inst.read_termination
    inst.read_termination = None
    try:
        rest = bytes(inst.read_bytes(int(digits) + 1))
    finally:
        inst.read_termination = saved
    return head + digits + rest


def drain_errors(inst) -> list[tuple[int, str]]:
    """Read SYSTem:ERRor? until 0 (SCPI-1999 error queue)."""
    out = []
    for _ in range(100):
        code, _, message = inst.query("SYST:ERR?").partition(",")
        if int(code) == 0:
            return out
        out.append((int(code), message))
    raise AssertionError("error queue never emptied")


def error_codes(inst) -> list[int]:
    """Just the numbers of :func:`drain_errors`."""
    return [code for code, _ in drain_errors(inst)]


def start_double_bench(config: WorldConfig, dialects: dict[str, str] | None = None):
    """The simulated instruments around a :class:`SimpleRcWorld` on a virtual clock,
    speaking the dialects of ``dialects`` (role -> profile name), SCPI-1999 otherwise."""
    from drivers.sim.bench import start_sim_bench

    clock = VirtualClock()
    return start_sim_bench(config, clock, world=SimpleRcWorld(config, clock), dialects=dialects)
