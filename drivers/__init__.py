"""Instrument I/O for the discharge bench: SCPI session over PyVISA, role drivers, profiles."""

from drivers.clock import Clock, RealClock, VirtualClock
from drivers.errors import (
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
]
