"""The simulated bench meter: its measuring function (the meter mode) set over SCPI.

The meter under test has modes ("AC V", "DC mV", "Ohm"...) that change its input network;
the profile's ``[meter.functions]`` table names the SCPI function of each mode.
:func:`load_meter_functions` reads that table and :class:`SimMeter` accepts any short or long
spelling of those functions and switches the World's meter mode. :data:`DEFAULT_PROFILE` is
the shipped profile the simulated instruments follow.
"""

from __future__ import annotations

import tomllib
from pathlib import Path

from drivers.sim.interfaces import World
from drivers.sim.scpi import Call, CommandRejected, ScpiDevice, match_nodes, parse_header_pattern
from rigbase.errors import ProfileError

__all__ = ["DEFAULT_PROFILE", "SimMeter", "load_meter_functions"]

DEFAULT_PROFILE = Path(__file__).resolve().parents[2] / "profiles" / "scpi1999.toml"


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
