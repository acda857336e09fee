"""The simulated programmable high-voltage supply: setpoints and output over SCPI.

:class:`SimSupply` keeps the voltage and current-limit setpoints and the output state, hands
them to the shared World (:class:`drivers.sim.interfaces.World`), and answers measurements
from it. Its headers are those of the ``[supply]`` table of ``drivers/profiles/scpi1999.toml``
with the optional nodes SCPI-1999 practice allows (``[SOURce]``, ``[:LEVel]``...); queries
of a setpoint also accept ``MIN``/``MAX``/``DEF``.
"""

from __future__ import annotations

from drivers.sim.interfaces import World
from drivers.sim.scpi import Call, ScpiDevice, format_number

__all__ = ["SimSupply"]


def _optional_limit(call: Call, low: float, high: float, default: float) -> str | None:
    """Answer of ``X? MIN|MAX|DEF`` (SCPI-1999 Vol. 1, 7.2.1), None when no parameter."""
    p = call.param(0)
    if p is None:
        return None
    word = p.choice("MINimum", "MAXimum", "DEFault")
    return format_number({"MINimum": low, "MAXimum": high, "DEFault": default}[word])


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
        self.add("OUTPut[:STATe]", set=self._set_output, query=self._get_output)
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

    def _get_output(self, call: Call) -> str:
        # a protection trip turns the output off behind the setting's back
        return str(int(self.output and not getattr(self.world, "tripped", False)))

    def _set_output(self, call: Call) -> None:
        self.output = call.params[0].boolean()
        if self.output and getattr(self.world, "tripped", False):
            self.world.tripped = False  # switching on again resets the trip
        self.world.supply_program(output=self.output)

    def _measure(self, which: int) -> str:
        return format_number(self.world.supply_measure()[which])
