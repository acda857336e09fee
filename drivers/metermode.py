"""Putting the meter under test into a mode: over SCPI, or by asking the operator.

Both classes share :class:`MeterMode`: the runner calls ``set_mode("AC V")`` and does not
care whether a command or a person turns the dial.
"""

from __future__ import annotations

import logging
from abc import ABC, abstractmethod
from collections.abc import Callable, Iterable

from drivers.profile import Profile
from drivers.session import ScpiSession
from rigbase.errors import InstrumentError, LimitError

__all__ = ["ManualMeterMode", "MeterMode", "ScpiMeterMode"]

log = logging.getLogger(__name__)


class MeterMode(ABC):
    """Sets the meter's mode by sequence-file name (``"AC V"``, ``"DC mV"``...)."""

    @abstractmethod
    def set_mode(self, name: str) -> None:
        """Put the meter into mode ``name``; returns once it is in that mode."""

    @abstractmethod
    def mode(self) -> str | None:
        """The current mode name, or None if not known."""


class ScpiMeterMode(MeterMode):
    """A bench meter whose function is set with the profile's ``[meter]`` commands."""

    ROLE = "meter"

    def __init__(self, session: ScpiSession, profile: Profile) -> None:
        profile.require_role(self.ROLE)
        self.session = session
        self.profile = profile

    def set_mode(self, name: str) -> None:
        """Send the function of mode ``name`` (ProfileError if the profile has no such mode)."""
        function = self.profile.meter_function(name)
        self.session.write(self.profile.command(self.ROLE, "set_function", function=function))

    def mode(self) -> str:
        """The mode the meter reports (InstrumentError if its function has no mode name)."""
        cmd = self.profile.command(self.ROLE, "get_function")
        text = self.session.query(cmd)
        mode = self.profile.meter_mode(text)
        if mode is None:
            raise InstrumentError(self.session.name, cmd, f"function {text!r} is not a known mode")
        return mode


class ManualMeterMode(MeterMode):
    """A meter whose dial a person turns: ``prompt(mode)`` returns once the dial is set.

    The CLI passes a callable that shows a message and waits for confirmation; the simulated
    bench passes the world's dial. ``modes`` optionally restricts the names accepted. Every
    request prompts, even for the mode last confirmed: the meter may have been swapped or
    touched since, and only the caller knows.
    """

    def __init__(self, prompt: Callable[[str], None], modes: Iterable[str] | None = None) -> None:
        self._prompt = prompt
        self._modes = tuple(modes) if modes is not None else None
        self._mode: str | None = None

    def set_mode(self, name: str) -> None:
        """Ask for mode ``name`` (LimitError if ``modes`` was given and lacks it)."""
        if self._modes is not None and name not in self._modes:
            raise LimitError(f"meter: unknown mode {name!r} (known: {', '.join(self._modes)})")
        log.info("meter: asking for mode %r", name)
        self._mode = None  # unknown until the prompt returns
        self._prompt(name)
        self._mode = name

    def mode(self) -> str | None:
        """The last mode confirmed by the prompt, or None before the first."""
        return self._mode
