"""Instrument I/O for the discharge bench: SCPI session over PyVISA, role drivers, profiles."""

from drivers.clock import Clock, RealClock, VirtualClock
from drivers.metermode import ManualMeterMode, MeterMode, ScpiMeterMode
from drivers.profile import Profile
from drivers.scope import Scope, Trace
from drivers.session import ScpiSession
from drivers.supply import Supply
from drivers.switch import SwitchBoard
from rigbase.errors import (
    BlockFormatError,
    ConnectionLost,
    FileFormatError,
    InstrumentError,
    InstrumentTimeout,
    LimitError,
    ProfileError,
    RigError,
    RunFolderError,
    SafetyError,
    ScpiError,
)

__all__ = [
    "BlockFormatError",
    "Clock",
    "ConnectionLost",
    "FileFormatError",
    "InstrumentError",
    "InstrumentTimeout",
    "LimitError",
    "ProfileError",
    "RealClock",
    "RigError",
    "RunFolderError",
    "SafetyError",
    "ScpiError",
    "VirtualClock",
    # instrument layer
    "ManualMeterMode",
    "MeterMode",
    "Profile",
    "Scope",
    "ScpiMeterMode",
    "ScpiSession",
    "Supply",
    "SwitchBoard",
    "Trace",
]
