"""The project's exceptions: one root, subclasses that are also the matching built-in.

    RigError
    ├── FileFormatError(ValueError)        a bench, sequence, profile or netlist file is wrong
    │   └── ProfileError                   ... a command-dialect profile in particular
    ├── LimitError(ValueError)             a value is outside a configured or physical limit
    ├── InstrumentError                    something went wrong talking to an instrument
    │   ├── ScpiError                      the instrument reported an error in its queue
    │   ├── InstrumentTimeout(TimeoutError) no answer in time
    │   ├── ConnectionLost(ConnectionError) the link dropped or cannot be opened
    │   └── BlockFormatError(ValueError)   a malformed IEEE 488.2 binary block
    ├── SafetyError                        an interlock or readback check failed
    └── RunFolderError(ValueError)         a run folder is missing, corrupt or inconsistent

Lower-layer exceptions (pyvisa, OSError) are translated once, at the session boundary, with
``raise ... from exc``. Every message is one line naming where the problem is.
"""

from __future__ import annotations

from pathlib import Path

__all__ = [
    "BlockFormatError",
    "ConnectionLost",
    "FileFormatError",
    "InstrumentError",
    "InstrumentTimeout",
    "LimitError",
    "ProfileError",
    "RigError",
    "RunFolderError",
    "SafetyError",
    "ScpiError",
]


class RigError(Exception):
    """Root of every error this project raises on purpose."""


class FileFormatError(RigError, ValueError):
    """A project input file is malformed: names the file, the key (and line) and the problem."""

    def __init__(self, path: str | Path, key: str, problem: str, line: int | None = None):
        self.path = str(path)
        self.key = key
        self.problem = problem
        self.line = line
        where = f"{self.path}:{line}" if line else self.path
        keypart = f" [{key}]" if key else ""
        super().__init__(f"{where}{keypart}: {problem}")


class ProfileError(FileFormatError):
    """A command-dialect profile file is malformed."""


class LimitError(RigError, ValueError):
    """A requested value lies outside a limit (bench file, profile or physics)."""


class SafetyError(RigError):
    """An interlock, a readback or a residual-voltage check failed."""


class RunFolderError(RigError, ValueError):
    """A run folder is missing, corrupt or inconsistent with its manifest."""


class InstrumentError(RigError):
    """An error talking to one instrument; names the instrument and the command."""

    def __init__(self, instrument: str, command: str | None, detail: str):
        self.instrument = instrument
        self.command = command
        self.detail = detail
        cmd = f" on {command!r}" if command else ""
        super().__init__(f"{instrument}{cmd}: {detail}")


class ScpiError(InstrumentError):
    """The instrument put an error in its queue (``SYSTem:ERRor?``)."""

    def __init__(self, instrument: str, command: str | None, code: int, message: str):
        self.code = code
        self.message = message
        super().__init__(instrument, command, f'SCPI error {code},"{message}"')


class InstrumentTimeout(InstrumentError, TimeoutError):
    """No (complete) answer within the timeout."""


class ConnectionLost(InstrumentError, ConnectionError):
    """The connection to the instrument cannot be opened or was lost."""


class BlockFormatError(InstrumentError, ValueError):
    """A binary block does not follow IEEE 488.2 definite-length format."""
