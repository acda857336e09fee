"""The simulated supply, switch board, scope and bench meter: SCPI state in front of a World.

Each instrument keeps its own settings (setpoints, ranges, trigger, format...) and asks the
shared :class:`drivers.sim.interfaces.World` for everything physical. Every command of
``drivers/profiles/scpi1999.toml`` is accepted in long and short form, in any case; optional
nodes (``[SOURce]``, ``[:LEVel]``...) follow common SCPI-1999 practice.

Identities are invented (``SIMULATED,<model>,<serial>,<version>``).
"""

from __future__ import annotations

import logging
import math
import tomllib
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
from scipy.signal import lfilter

from drivers.sim.interfaces import World
from drivers.sim.scpi import (
    Block,
    Call,
    CommandRejected,
    ScpiDevice,
    format_number,
    match_nodes,
    parse_header_pattern,
)
from rigbase.errors import ProfileError

__all__ = [
    "DEFAULT_PROFILE",
    "SimMeter",
    "SimScope",
    "SimSupply",
    "SimSwitch",
    "load_meter_functions",
]

logger = logging.getLogger(__name__)

DEFAULT_PROFILE = Path(__file__).resolve().parent.parent / "profiles" / "scpi1999.toml"


def _optional_limit(call: Call, low: float, high: float, default: float) -> str | None:
    """Answer of ``X? MIN|MAX|DEF`` (SCPI-1999 vol. 1 7.2.1), None when no parameter."""
    p = call.param(0)
    if p is None:
        return None
    word = p.choice("MINimum", "MAXimum", "DEFault")
    return format_number({"MINimum": low, "MAXimum": high, "DEFault": default}[word])


# ----------------------------------------------------------------------------------------------
# Supply


class SimSupply(ScpiDevice):
    """Programmable HV supply: voltage and current setpoints, output state, measurements."""

    def __init__(self, world: World, identity: str = "SIMULATED,HV-SUPPLY,SN0001,0.1") -> None:
        super().__init__(identity)
        self.world = world
        self.max_volts = float(world.config.supply_max_volts)
        self.max_amps = float(world.config.supply_max_amps)
        self.volts = 0.0
        self.amps = self.max_amps
        self.output = False
        lev = "[:LEVel][:IMMediate][:AMPLitude]"
        self.add(
            f"[SOURce]:VOLTage{lev}", set=self._set_volts, query=self._get_volts, query_args=(0, 1)
        )
        self.add(
            f"[SOURce]:CURRent{lev}", set=self._set_amps, query=self._get_amps, query_args=(0, 1)
        )
        self.add("OUTPut[:STATe]", set=self._set_output, query=lambda c: str(int(self.output)))
        self.add("MEASure[:SCALar]:VOLTage[:DC]", query=lambda c: self._measure(0))
        self.add("MEASure[:SCALar]:CURRent[:DC]", query=lambda c: self._measure(1))

    def reset(self) -> None:
        """*RST: output off, 0 V, current limit at its maximum (DEF)."""
        self.volts, self.amps, self.output = 0.0, self.max_amps, False
        self.world.supply_program(volts=0.0, amps=self.amps, output=False)

    def _set_volts(self, call: Call) -> None:
        self.volts = call.params[0].number("V", low=0.0, high=self.max_volts, default=0.0)
        self.world.supply_program(volts=self.volts)

    def _get_volts(self, call: Call) -> str:
        return _optional_limit(call, 0.0, self.max_volts, 0.0) or format_number(self.volts)

    def _set_amps(self, call: Call) -> None:
        self.amps = call.params[0].number("A", low=0.0, high=self.max_amps, default=self.max_amps)
        self.world.supply_program(amps=self.amps)

    def _get_amps(self, call: Call) -> str:
        limit = _optional_limit(call, 0.0, self.max_amps, self.max_amps)
        return limit or format_number(self.amps)

    def _set_output(self, call: Call) -> None:
        self.output = call.params[0].boolean()
        self.world.supply_program(output=self.output)

    def _measure(self, which: int) -> str:
        return format_number(self.world.supply_measure()[which])


# ----------------------------------------------------------------------------------------------
# Switch board


class SimSwitch(ScpiDevice):
    """Relay board with ``channels`` channels, SCPI ROUTe commands with channel lists."""

    def __init__(
        self,
        world: World,
        channels: int = 16,
        identity: str = "SIMULATED,RELAY-BOARD-16,SN0002,0.1",
    ) -> None:
        super().__init__(identity)
        self.world = world
        self.n_channels = channels
        self.add(
            "ROUTe:CLOSe", set=self._close, query=lambda c: self._state(c, True), query_args=(1, 1)
        )
        self.add(
            "ROUTe:OPEN", set=self._open, query=lambda c: self._state(c, False), query_args=(1, 1)
        )
        self.add("ROUTe:OPEN:ALL", set=self._open_all, set_args=(0, 0))
        self.add("ROUTe:CLOSe:STATe", query=self._closed_list)

    def reset(self) -> None:
        """*RST: every relay open."""
        self.world.relay_set(list(range(1, self.n_channels + 1)), False)

    def _channels(self, call: Call) -> list[int]:
        chans = list(call.params[0].channels())
        if not chans:
            raise CommandRejected(-109, "empty channel list")
        bad = [c for c in chans if not 1 <= c <= self.n_channels]
        if bad:
            raise CommandRejected(-222, f"channel {bad[0]} outside 1..{self.n_channels}")
        return chans

    def _close(self, call: Call) -> None:
        self.world.relay_set(self._channels(call), True)

    def _open(self, call: Call) -> None:
        self.world.relay_set(self._channels(call), False)

    def _open_all(self, call: Call) -> None:
        self.world.relay_set(list(range(1, self.n_channels + 1)), False)

    def _state(self, call: Call, closed: bool) -> str:
        states = self.world.relay_commanded(self._channels(call))
        return ",".join(str(int(s == closed)) for s in states)

    def _closed_list(self, call: Call) -> str:
        chans = list(range(1, self.n_channels + 1))
        closed = [c for c, s in zip(chans, self.world.relay_commanded(chans), strict=True) if s]
        return "(@" + ",".join(str(c) for c in closed) + ")"


# ----------------------------------------------------------------------------------------------
# Bench meter


def load_meter_functions(path: str | Path = DEFAULT_PROFILE) -> dict[str, str]:
    """The ``[meter.functions]`` table of a profile: mode name -> SCPI function."""
    path = Path(path)
    try:
        data = tomllib.loads(path.read_text(encoding="utf-8"))
    except (OSError, tomllib.TOMLDecodeError) as exc:
        raise ProfileError(path, "", f"cannot read profile: {exc}") from exc
    table = data.get("meter", {}).get("functions")
    if not isinstance(table, dict) or not table:
        raise ProfileError(path, "meter.functions", "missing or empty table")
    for mode, func in table.items():
        if not isinstance(func, str):
            raise ProfileError(path, f"meter.functions.{mode}", "function must be a string")
        try:
            parse_header_pattern(func)
        except ValueError as exc:
            raise ProfileError(path, f"meter.functions.{mode}", str(exc)) from exc
    return dict(table)


class SimMeter(ScpiDevice):
    """Bench meter whose function (the World's meter mode) is set over SCPI.

    ``SENSe:FUNCtion "<function>"`` takes any short/long spelling of a function of the
    profile's ``[meter.functions]`` table; the query answers the profile's spelling in quotes.
    *RST leaves the function unchanged (the mode is part of the device under test).
    """

    def __init__(
        self,
        world: World,
        functions: dict[str, str] | None = None,
        identity: str = "SIMULATED,BENCH-METER,SN0004,0.1",
    ) -> None:
        super().__init__(identity)
        self.world = world
        self.functions = functions if functions is not None else load_meter_functions()
        self._patterns = {mode: parse_header_pattern(f) for mode, f in self.functions.items()}
        self.add("[SENSe]:FUNCtion[:ON]", set=self._set_function, query=self._get_function)

    def _set_function(self, call: Call) -> None:
        typed = call.params[0].string().strip().upper().split(":")
        for mode, nodes in self._patterns.items():
            if match_nodes(nodes, typed) is not None:
                if mode not in self.world.meter_modes():
                    raise CommandRejected(-224, f"this meter has no {mode} mode")
                self.world.meter_set_mode(mode)
                return
        raise CommandRejected(-224, f"unknown function {call.params[0].text[:30]}")

    def _get_function(self, call: Call) -> str:
        mode = self.world.meter_mode()
        if mode not in self.functions:
            raise CommandRejected(-221, f"mode {mode} has no SCPI function")
        return f'"{self.functions[mode]}"'


# ----------------------------------------------------------------------------------------------
# Scope

N_INPUTS = 4
AC_COUPLING_HZ = 10.0  # corner of the AC-coupling high-pass (common practice, no source)
_TRIGGER_CHUNK = 1_000_000  # samples evaluated per World call during the trigger search


@dataclass
class _Input:
    coupling: str = "DC"
    ohms: float = 1e6
    bw_hz: float = 20e6
    bw_on: bool = False
    range_v: float = 1.0
    offset_v: float = 0.0
    on: bool = True


@dataclass
class _Acquisition:
    """One single-shot record: settings frozen at arming, trigger search state, data."""

    t_arm: float
    dt: float
    points: int
    x_origin: float
    source: int
    level: float
    slope: str
    bandwidths: tuple[float | None, ...]
    inputs: tuple[_Input, ...]
    windows: dict[float, tuple[int, float | None]] = field(default_factory=dict)
    t_trig: float | None = None
    volts: dict[int, np.ndarray] | None = None  # per input: volts - offset, float32

    def t_last(self) -> float:
        assert self.t_trig is not None
        return self.t_trig + self.x_origin + (self.points - 1) * self.dt


class SimScope(ScpiDevice):
    """Four-input digitiser: front end, edge trigger, single-shot records, INT,8/16 blocks.

    The trigger search and the records follow the module's contract in DEVELOPERS.md: the
    trigger input is evaluated (noise-free, DC-coupled, with its bandwidth limit) on the sample
    grid starting at the arming time and at every switching instant of the world, up to
    ``points`` samples per start and never beyond ``clock.now()``; the first sample that
    crosses the level with the slope is the trigger. Records get Gaussian noise
    (``config.noise_volts`` rms) and, for AC coupling, a first-order 10 Hz high-pass that
    assumes the input sat at its first value before the record (an approximation).
    The input impedance is kept as a setting only: the World has no input-loading model.
    """

    def __init__(
        self,
        world: World,
        rng: np.random.Generator | None = None,
        identity: str = "SIMULATED,DIGITISER-4CH,SN0003,0.1",
        native_bandwidth_hz: float | None = None,
    ) -> None:
        super().__init__(identity)
        self.world = world
        self.rng = rng if rng is not None else np.random.default_rng(world.config.seed)
        self.native_bandwidth_hz = native_bandwidth_hz
        self._set_defaults()
        self._register()

    # -- settings ------------------------------------------------------------------------------

    def _set_defaults(self) -> None:
        self.inputs = [_Input() for _ in range(N_INPUTS)]
        self.dt = 1e-9
        self.points = 10_000
        self.x_origin = 0.0
        self.trig_source = 1
        self.trig_level = 0.0
        self.trig_slope = "POSitive"
        self.bits = 8
        self.swapped = False
        self.continuous = False
        self.acq: _Acquisition | None = None
        self.complete: _Acquisition | None = None

    def reset(self) -> None:
        """*RST: default settings, acquisition stopped, record discarded."""
        self._set_defaults()

    def _register(self) -> None:
        a = self.add
        a("INPut#:COUPling", set=self._set_coupling, query=lambda c: self._inp(c).coupling)
        a(
            "INPut#:IMPedance",
            set=self._set_impedance,
            query=lambda c: format_number(self._inp(c).ohms),
        )
        a(
            "INPut#:FILTer[:LPASs]:FREQuency",
            set=self._set_bw,
            query=lambda c: format_number(self._inp(c).bw_hz),
        )
        a(
            "INPut#:FILTer[:LPASs][:STATe]",
            set=self._set_bw_state,
            query=lambda c: str(int(self._inp(c).bw_on)),
        )
        a(
            "SENSe#:VOLTage[:DC]:RANGe[:PTPeak]",
            set=self._set_range,
            query=lambda c: format_number(self._inp(c, "SENSe").range_v),
        )
        a(
            "SENSe#:VOLTage[:DC]:OFFSet",
            set=self._set_offset,
            query=lambda c: format_number(self._inp(c, "SENSe").offset_v),
        )
        a("SENSe#:STATe", set=self._set_state, query=lambda c: str(int(self._inp(c, "SENSe").on)))
        a("[SENSe]:SWEep:TINTerval", set=self._set_dt, query=lambda c: format_number(self.dt))
        a("[SENSe]:SWEep:POINts", set=self._set_points, query=lambda c: str(self.points))
        a(
            "[SENSe]:SWEep:OFFSet:TIME",
            set=self._set_xorigin,
            query=lambda c: format_number(self.x_origin),
        )
        trig = "TRIGger[:SEQuence]"
        a(f"{trig}:SOURce", set=self._set_source, query=lambda c: f"INT{self.trig_source}")
        a(f"{trig}:LEVel", set=self._set_level, query=lambda c: format_number(self.trig_level))
        a(f"{trig}:SLOPe", set=self._set_slope, query=lambda c: self.trig_slope[:3].upper())
        a(
            "INITiate:CONTinuous",
            set=self._set_continuous,
            query=lambda c: str(int(self.continuous)),
        )
        a("INITiate[:IMMediate]", set=self._initiate, set_args=(0, 0))
        a("ABORt", set=self._abort, set_args=(0, 0))
        a(
            "FORMat[:DATA]",
            set=self._set_format,
            query=lambda c: f"INT,{self.bits}",
            set_args=(1, 2),
        )
        a("FORMat:BORDer", set=self._set_border, query=lambda c: "SWAP" if self.swapped else "NORM")
        a("TRACe[:DATA]", query=self._fetch, query_args=(1, 1))
        a("TRACe:PREamble", query=self._preamble, query_args=(1, 1))
        a("MEASure[:SCALar]:VOLTage[:DC]", query=self._measure_dc, query_args=(1, 1))

    def _inp(self, call: Call, node: str = "INPut") -> _Input:
        n = call.suffix(node)
        if not 1 <= n <= N_INPUTS:
            raise CommandRejected(-114, f"{node}{n}")
        return self.inputs[n - 1]

    def _set_coupling(self, call: Call) -> None:
        self._inp(call).coupling = call.params[0].choice("AC", "DC")

    def _set_impedance(self, call: Call) -> None:
        inp = self._inp(call)
        ohms = call.params[0].number("OHM", low=50.0, high=1e6, default=1e6)
        if ohms not in (50.0, 1e6):
            raise CommandRejected(-224, f"impedance {format_number(ohms)} not 50 or 1E6")
        inp.ohms = ohms

    def _set_bw(self, call: Call) -> None:
        inp = self._inp(call)
        inp.bw_hz = call.params[0].number("HZ", low=1e3, high=10e9, default=20e6)

    def _set_bw_state(self, call: Call) -> None:
        self._inp(call).bw_on = call.params[0].boolean()

    def _set_range(self, call: Call) -> None:
        inp = self._inp(call, "SENSe")
        inp.range_v = call.params[0].number("V", low=1e-3, high=1e3, default=1.0)

    def _set_offset(self, call: Call) -> None:
        inp = self._inp(call, "SENSe")
        inp.offset_v = call.params[0].number("V", low=-1e3, high=1e3, default=0.0)

    def _set_state(self, call: Call) -> None:
        self._inp(call, "SENSe").on = call.params[0].boolean()

    def _set_dt(self, call: Call) -> None:
        self.dt = call.params[0].number("S", low=1e-10, high=1.0, default=1e-9)

    def _set_points(self, call: Call) -> None:
        self.points = call.params[0].integer(low=1000, high=10_000_000, default=10_000)

    def _set_xorigin(self, call: Call) -> None:
        self.x_origin = call.params[0].number("S", low=-10.0, high=10.0, default=0.0)

    def _set_source(self, call: Call) -> None:
        word = call.params[0].choice("INTernal#")
        n = int(word[len("INTernal") :])
        if not 1 <= n <= N_INPUTS:
            raise CommandRejected(-224, f"trigger source INTernal{n}")
        self.trig_source = n

    def _set_level(self, call: Call) -> None:
        self.trig_level = call.params[0].number("V", low=-1e3, high=1e3, default=0.0)

    def _set_slope(self, call: Call) -> None:
        self.trig_slope = call.params[0].choice("POSitive", "NEGative", "EITHer")

    def _set_format(self, call: Call) -> None:
        call.params[0].choice("INTeger")
        bits = 8
        p = call.param(1)
        if p is not None:
            bits = p.integer(low=1, high=64)
            if bits not in (8, 16):
                raise CommandRejected(-224, f"INT,{bits}: only INT,8 and INT,16")
        self.bits = bits

    def _set_border(self, call: Call) -> None:
        self.swapped = call.params[0].choice("NORMal", "SWAPped") == "SWAPped"

    # -- acquisition ---------------------------------------------------------------------------

    def _bandwidths(self) -> tuple[float | None, ...]:
        return tuple(i.bw_hz if i.bw_on else self.native_bandwidth_hz for i in self.inputs)

    def _arm(self, t_arm: float) -> None:
        self.acq = _Acquisition(
            t_arm=t_arm,
            dt=self.dt,
            points=self.points,
            x_origin=self.x_origin,
            source=self.trig_source,
            level=self.trig_level,
            slope=self.trig_slope,
            bandwidths=self._bandwidths(),
            inputs=tuple(_Input(**vars(i)) for i in self.inputs),
        )
        logger.debug("%s: armed at %s", self.identity, t_arm)

    def _set_continuous(self, call: Call) -> None:
        self.continuous = call.params[0].boolean()
        if self.continuous and self.acq is None:
            self._arm(self.world.clock.now())

    def _initiate(self, call: Call) -> None:
        # a new single shot makes the previous record stale (TRACe:DATA? -> -230 until done)
        self.complete = None
        self._arm(self.world.clock.now())

    def _abort(self, call: Call) -> None:
        self.acq = None
        if self.continuous:
            self._arm(self.world.clock.now())

    def _advance(self) -> None:
        """Run the trigger search up to now; move a finished record to ``complete``."""
        for _ in range(1000):  # continuous mode: at most this many records per poll
            acq = self.acq
            if acq is None:
                return
            now = self.world.clock.now()
            if acq.t_trig is None and not self.world.config.faults.scope_never_triggers:
                acq.t_trig = self._search(acq, now)
            if acq.t_trig is None or now < acq.t_last():
                return
            self.complete = acq
            self.acq = None
            if self.continuous:
                self._arm(acq.t_last())

    def _search(self, acq: _Acquisition, now: float) -> float | None:
        # start -> whether the network switched there (then the sample one interval before
        # the switch is the "previous" sample, so an edge right at arming is still seen)
        starts = {acq.t_arm: False}
        starts.update((s, True) for s in self.world.switching_times(acq.t_arm, now))
        src = acq.source
        bws = acq.bandwidths[:src]
        found: list[float] = []
        for s in sorted(starts):
            done, last = acq.windows.get(s, (0, None))
            if done >= acq.points or now < s:
                continue
            if s < acq.t_arm or (found and s >= min(found)):
                continue  # a later window cannot trigger earlier than a found crossing
            available = min(acq.points, int(math.floor((now - s) / acq.dt * (1 + 1e-12))) + 1)
            if last is None and starts[s]:
                before = self.world.scope_inputs(np.array([s - acq.dt]), bws)
                last = float(before[src - 1, 0])
            while done < available:
                stop = min(available, done + _TRIGGER_CHUNK)
                t = s + np.arange(done, stop) * acq.dt
                v = self.world.scope_inputs(t, bws)[src - 1]
                hit = _first_crossing(v, last, acq.level, acq.slope)
                if hit is not None:
                    found.append(float(t[hit]))
                    break
                done, last = stop, float(v[-1])
            acq.windows[s] = (done, last)
        if not found:
            return None
        # windows overlap on different sample grids; a sample evaluated at the very instant
        # of a later switch saw the old state, so the earliest crossing of any window counts
        t_trig = min(found)
        logger.debug("%s: triggered at %s", self.identity, t_trig)
        return t_trig

    def operation_condition(self) -> int:
        """SCPI-1999 STATus:OPERation bits: 5 (32) waiting for trigger, 3 (8) measuring."""
        self._advance()
        if self.acq is None:
            return 0
        return 32 if self.acq.t_trig is None else 8

    def _record(self, n: int) -> tuple[_Acquisition, np.ndarray]:
        self._advance()
        acq = self.complete
        if acq is None:
            raise CommandRejected(-230, "no completed acquisition")
        if not 1 <= n <= N_INPUTS:
            raise CommandRejected(-224, f"INTernal{n}")
        if not acq.inputs[n - 1].on:
            raise CommandRejected(-221, f"input {n} was off")
        if acq.volts is None:
            acq.volts = self._make_record(acq)
        return acq, acq.volts[n]

    def _make_record(self, acq: _Acquisition) -> dict[int, np.ndarray]:
        """Samples of every enabled input, stored as float32 volts relative to the input's
        offset (float32 keeps 16-bit resolution near mid-scale even with a large offset)."""
        assert acq.t_trig is not None
        on = [k + 1 for k, i in enumerate(acq.inputs) if i.on]
        highest = max(on)
        out = {n: np.empty(acq.points, dtype=np.float32) for n in on}
        noise = float(self.world.config.noise_volts)
        rc = 1.0 / (2.0 * math.pi * AC_COUPLING_HZ)
        a = rc / (rc + acq.dt)
        # AC coupling, first-order high-pass y[k] = a (y[k-1] + x[k] - x[k-1]), its state carried
        # across chunks; before the record the input is taken as steady at its first value
        hp_state: dict[int, tuple[float, np.ndarray]] = {}
        t0 = acq.t_trig + acq.x_origin
        for start in range(0, acq.points, _TRIGGER_CHUNK):
            stop = min(acq.points, start + _TRIGGER_CHUNK)
            t = t0 + np.arange(start, stop) * acq.dt
            v = self.world.scope_inputs(t, acq.bandwidths[:highest])
            for n in on:
                inp = acq.inputs[n - 1]
                x = np.asarray(v[n - 1], dtype=np.float64)
                if inp.coupling == "AC":
                    prev, zi = hp_state.get(n, (float(x[0]), np.zeros(1)))
                    x, zi = lfilter([a], [1.0, -a], np.diff(x, prepend=prev), zi=zi)
                    hp_state[n] = (float(v[n - 1][-1]), zi)
                if noise > 0:
                    x = x + self.rng.normal(0.0, noise, stop - start)
                out[n][start:stop] = x - inp.offset_v
        return out

    def _channel_param(self, call: Call) -> int:
        return int(call.params[0].choice("INTernal#")[len("INTernal") :])

    def _scaling(self, acq: _Acquisition, n: int) -> tuple[float, float]:
        inp = acq.inputs[n - 1]
        return inp.range_v / 2.0**self.bits, inp.offset_v

    def _fetch(self, call: Call) -> Block:
        n = self._channel_param(call)
        acq, volts = self._record(n)
        y_inc, _ = self._scaling(acq, n)
        lo, hi = -(2 ** (self.bits - 1)), 2 ** (self.bits - 1) - 1
        codes = np.clip(np.rint(volts.astype(np.float64) / y_inc), lo, hi)  # volts - y_off
        dtype = np.dtype(f"i{self.bits // 8}").newbyteorder("<" if self.swapped else ">")
        return Block(codes.astype(dtype).tobytes())

    def _preamble(self, call: Call) -> str:
        n = self._channel_param(call)
        acq, _ = self._record(n)
        y_inc, y_off = self._scaling(acq, n)
        fields = (acq.points, acq.dt, acq.x_origin, y_inc, y_off, 0)
        return ",".join(format_number(f) for f in fields)

    def _measure_dc(self, call: Call) -> str:
        n = self._channel_param(call)
        if not 1 <= n <= N_INPUTS:
            raise CommandRejected(-224, f"INTernal{n}")
        now = self.world.clock.now()
        value = float(self.world.scope_inputs(np.array([now]), [None] * n)[n - 1, 0])
        # the mean of 1000 noise samples has rms noise / sqrt(1000)
        value += float(self.rng.normal(0.0, self.world.config.noise_volts / math.sqrt(1000)))
        return format_number(value)


def _first_crossing(v: np.ndarray, last: float | None, level: float, slope: str) -> int | None:
    """Index of the first sample of ``v`` that crosses ``level`` with ``slope``."""
    if last is None:
        prev, cur, offset = v[:-1], v[1:], 1
    else:
        prev, cur, offset = np.concatenate(([last], v[:-1])), v, 0
    rising = (prev < level) & (cur >= level)
    falling = (prev > level) & (cur <= level)
    mask = rising if slope == "POSitive" else falling if slope == "NEGative" else rising | falling
    hits = np.flatnonzero(mask)
    return int(hits[0]) + offset if hits.size else None
