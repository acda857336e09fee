"""The simulated four-input digitiser: front-end settings, acquisition control, transfers.

:class:`SimScope` keeps the settings of each input (coupling, impedance, bandwidth limit,
span, offset), the timebase and the edge trigger, arms single-shot or continuous
acquisitions (:mod:`drivers.sim.instruments.acquisition` does the trigger search and makes
the samples) and answers the transfer queries: raw codes as an INT,8 or INT,16
definite-length block in either byte order, the scaling of those codes (``TRACe:SCALing?``,
fields in the order of the shipped profile's ``[scope.scaling_fields]``) and an immediate DC
mean. Acquisition state is reported in STATus:OPERation (bit 5 waiting for trigger, bit 3
measuring; SCPI-1999 Vol. 1 status reporting, from memory).
"""

from __future__ import annotations

import logging
import math

import numpy as np

from drivers.sim.instruments.acquisition import N_INPUTS, SAMPLINGS, Acquisition, InputSettings
from drivers.sim.interfaces import World
from drivers.sim.scpi import Block, Call, CommandRejected, ScpiDevice, format_number

__all__ = ["SimScope"]

logger = logging.getLogger(__name__)


class SimScope(ScpiDevice):
    """Four-input digitiser: front end, edge trigger, single-shot records, INT,8/16 blocks.

    The trigger search and the records are those of
    :class:`~drivers.sim.instruments.acquisition.Acquisition` (contract in DEVELOPERS.md).
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
        self.inputs = [InputSettings() for _ in range(N_INPUTS)]
        self.dt = 1e-9
        self.points = 10_000
        self.trigger_offset_s = 0.0
        self.sampling = "POINt"
        self.trig_source = 1
        self.trig_level = 0.0
        self.trig_slope = "POSitive"
        self.bits = 8
        self.swapped = False
        self.continuous = False
        self.acq: Acquisition | None = None
        self.complete: Acquisition | None = None

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
            set=self._set_trigger_offset,
            query=lambda c: format_number(self.trigger_offset_s),
        )
        a(
            "[SENSe]:SWEep:SAMPling",
            set=self._set_sampling,
            query=lambda c: self.sampling.upper()[:4],
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
        a(f"{trig}:IMMediate", set=self._force, set_args=(0, 0))
        a(
            "FORMat[:DATA]",
            set=self._set_format,
            query=lambda c: f"INT,{self.bits}",
            set_args=(1, 2),
        )
        a("FORMat:BORDer", set=self._set_border, query=lambda c: "SWAP" if self.swapped else "NORM")
        a("TRACe[:DATA]", query=self._fetch, query_args=(1, 1))
        a("TRACe:SCALing", query=self._scaling_reply, query_args=(1, 1))
        a("MEASure[:SCALar]:VOLTage[:DC]", query=self._measure_dc, query_args=(1, 1))

    def _inp(self, call: Call, node: str = "INPut") -> InputSettings:
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

    def _set_trigger_offset(self, call: Call) -> None:
        self.trigger_offset_s = call.params[0].number("S", low=-10.0, high=10.0, default=0.0)

    def _set_sampling(self, call: Call) -> None:
        self.sampling = call.params[0].choice(*SAMPLINGS)

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
        self.acq = Acquisition(
            t_arm=t_arm,
            phase=float(self.rng.random()),  # the sample clock runs freely
            dt=self.dt,
            points=self.points,
            trigger_offset_s=self.trigger_offset_s,
            source=self.trig_source,
            level=self.trig_level,
            slope=self.trig_slope,
            bandwidths=self._bandwidths(),
            inputs=tuple(InputSettings(**vars(i)) for i in self.inputs),
            sampling=self.sampling,
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

    def _force(self, call: Call) -> None:
        """Trigger now, whatever the input does (a record with no input)."""
        self._advance()
        if self.acq is not None and self.acq.t_trig is None:
            self.acq.t_trig = self.world.clock.now()

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
                acq.t_trig = acq.search(self.world, now)
                if acq.t_trig is not None:
                    logger.debug("%s: triggered at %s", self.identity, acq.t_trig)
            if acq.t_trig is None or now < acq.t_last():
                return
            self.complete = acq
            self.acq = None
            if self.continuous:
                self._arm(acq.t_first() + (acq.points - 1) * acq.dt)

    def operation_condition(self) -> int:
        """SCPI-1999 STATus:OPERation bits: 5 (32) waiting for trigger, 3 (8) measuring."""
        self._advance()
        if self.acq is None:
            return 0
        return 32 if self.acq.t_trig is None else 8

    def _record(self, n: int) -> tuple[Acquisition, np.ndarray]:
        self._advance()
        acq = self.complete
        if acq is None:
            raise CommandRejected(-230, "no completed acquisition")
        if not 1 <= n <= N_INPUTS:
            raise CommandRejected(-224, f"INTernal{n}")
        if not acq.inputs[n - 1].on:
            raise CommandRejected(-221, f"input {n} was off")
        if acq.volts is None:
            acq.volts = acq.make_record(self.world, self.rng)
        return acq, acq.volts[n]

    def _channel_param(self, call: Call) -> int:
        return int(call.params[0].choice("INTernal#")[len("INTernal") :])

    def _scaling(self, acq: Acquisition, n: int) -> tuple[float, float]:
        """(volts per code, volts at code 0) of input ``n`` in the present format."""
        inp = acq.inputs[n - 1]
        return inp.range_v / 2.0**self.bits, inp.offset_v

    def _fetch(self, call: Call) -> Block:
        n = self._channel_param(call)
        acq, volts = self._record(n)
        volts_per_code, _ = self._scaling(acq, n)
        lo, hi = -(2 ** (self.bits - 1)), 2 ** (self.bits - 1) - 1
        # the record holds volts minus the input's offset, so code 0 reads the offset
        codes = np.clip(np.rint(volts.astype(np.float64) / volts_per_code), lo, hi)
        dtype = np.dtype(f"i{self.bits // 8}").newbyteorder("<" if self.swapped else ">")
        return Block(codes.astype(dtype).tobytes())

    def _scaling_reply(self, call: Call) -> str:
        """``TRACe:SCALing? INTernal<n>``: points, sample interval (s), time of the first
        sample from the trigger (s), volts per code, volts at the reference code, reference
        code; comma separated, in the order of the shipped profile's [scope.scaling_fields]."""
        n = self._channel_param(call)
        acq, _ = self._record(n)
        volts_per_code, reference_volts = self._scaling(acq, n)
        fields = (acq.points, acq.dt, acq.first_sample_s(), volts_per_code, reference_volts, 0)
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
