"""Clocks: the runner and the simulated bench share one, so time can be virtual.

``RealClock`` is wall time (hardware, ``rig sim serve``). ``VirtualClock`` only moves when
someone sleeps on it: a 1,000-event run finishes in seconds and a charge dwell that is too
short still leaves the simulated capacitor partly charged.
"""

from __future__ import annotations

import threading
import time
from typing import Protocol, runtime_checkable

__all__ = ["Clock", "RealClock", "VirtualClock"]


@runtime_checkable
class Clock(Protocol):
    """Monotonic time source in seconds."""

    virtual: bool

    def now(self) -> float:
        """Current time in seconds (arbitrary origin, monotonic)."""
        ...

    def sleep(self, seconds: float) -> None:
        """Let ``seconds`` pass (negative or zero returns at once)."""
        ...


class RealClock:
    """Wall-clock time (``time.monotonic``)."""

    virtual = False

    def now(self) -> float:
        return time.monotonic()

    def sleep(self, seconds: float) -> None:
        if seconds > 0:
            time.sleep(seconds)


class VirtualClock:
    """Time that advances only through :meth:`sleep` (thread-safe)."""

    virtual = True

    def __init__(self, start: float = 0.0) -> None:
        self._t = float(start)
        self._lock = threading.Lock()

    def now(self) -> float:
        with self._lock:
            return self._t

    def sleep(self, seconds: float) -> None:
        if seconds > 0:
            with self._lock:
                self._t += float(seconds)
