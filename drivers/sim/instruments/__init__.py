"""The simulated supply, switch board, scope and bench meter: SCPI state in front of a World.

Each instrument keeps its own settings (setpoints, ranges, trigger, format...) and asks the
shared :class:`drivers.sim.interfaces.World` for everything physical. Every command of
``drivers/profiles/scpi1999.toml`` is accepted in long and short form, in any case; optional
nodes (``[SOURce]``, ``[:LEVel]``...) follow common SCPI-1999 practice. One module per
instrument (:mod:`.supply`, :mod:`.switchboard`, :mod:`.scope` with :mod:`.acquisition`,
:mod:`.meter`); this face hands on their public names.

Identities are invented (``SIMULATED,<model>,<serial>,<version>``).
"""

from drivers.sim.instruments.meter import DEFAULT_PROFILE, SimMeter, load_meter_functions
from drivers.sim.instruments.scope import SimScope
from drivers.sim.instruments.supply import SimSupply
from drivers.sim.instruments.switchboard import SimSwitch

__all__ = [
    "DEFAULT_PROFILE",
    "SimMeter",
    "SimScope",
    "SimSupply",
    "SimSwitch",
    "load_meter_functions",
]
