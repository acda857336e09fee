"""The relay (switch) board role: channel lists, readback, break-before-make transfers.

Channels are checked against ``[switch.ranges] channel`` before anything is sent.
:meth:`SwitchBoard.transfer` never lets two paths conduct at once: it opens, verifies the
readback, waits the settle time on the given clock, and only then closes.
"""

from __future__ import annotations

import logging
from collections.abc import Iterable, Sequence

from drivers.clock import Clock
from drivers.profile import Profile
from drivers.session import ScpiSession
from rigbase.errors import InstrumentError, LimitError, SafetyError

__all__ = ["SwitchBoard", "channel_list"]

log = logging.getLogger(__name__)


def channel_list(channels: Sequence[int]) -> str:
    """SCPI channel list for ``channels``: ``[1, 3]`` -> ``"(@1,3)"`` (SCPI-1999 Vol. 1
    channel lists, ``(@1,2)`` and ``(@1:4)``)."""
    return "(@" + ",".join(str(int(c)) for c in channels) + ")"


class SwitchBoard:
    """A relay board addressed by channel number."""

    ROLE = "switch"

    def __init__(self, session: ScpiSession, profile: Profile) -> None:
        profile.require_role(self.ROLE)
        self.session = session
        self.profile = profile
        self._low, self._high = profile.ranges(self.ROLE)["channel"]

    @property
    def name(self) -> str:
        """Instrument name used in errors."""
        return self.session.name

    def _channels(self, channels: Iterable[int] | int) -> list[int]:
        items = [channels] if isinstance(channels, int) else list(channels)
        out: list[int] = []
        for c in items:
            if isinstance(c, bool) or not isinstance(c, int):
                raise LimitError(f"{self.name}: channel {c!r} is not an integer")
            if not self._low <= c <= self._high:
                raise LimitError(
                    f"{self.name}: channel {c} outside [{self._low:g}, {self._high:g}] "
                    f"(profile {self.profile.path.name} [switch.ranges] channel)"
                )
            if c not in out:
                out.append(c)
        return out

    def _cmd(self, operation: str, **fields: object) -> str:
        return self.profile.command(self.ROLE, operation, **fields)

    def _list(self, chans: list[int]) -> str:
        """The channel list as the profile writes it (``[switch.channel_list]``)."""
        return self.profile.dialect.channel_list.text(chans)

    def close(self, channels: Iterable[int] | int) -> None:
        """Close (make) the relays of ``channels``; an empty list sends nothing."""
        chans = self._channels(channels)
        if chans:
            self.session.write(self._cmd("close", channels=self._list(chans)))

    def open(self, channels: Iterable[int] | int) -> None:
        """Open (break) the relays of ``channels``; an empty list sends nothing."""
        chans = self._channels(channels)
        if chans:
            self.session.write(self._cmd("open", channels=self._list(chans)))

    def open_all(self) -> None:
        """Open every relay of the board."""
        self.session.write(self._cmd("open_all"))

    def closed(self, channels: Iterable[int] | int) -> list[bool]:
        """Readback: True for each channel the board reports closed, in the order given."""
        chans = self._channels(channels)
        if not chans:
            return []
        cmd = self._cmd("get_closed", channels=self._list(chans))
        text = self.session.query(cmd)
        rb = self.profile.dialect.readback
        words = [w.strip() for w in text.strip().split(rb.separator.strip() or None)]
        if len(words) != len(chans) or any(w not in (rb.closed, rb.open) for w in words):
            raise InstrumentError(
                self.name,
                cmd,
                f"expected {len(chans)} values {rb.closed}/{rb.open} separated by "
                f"{rb.separator!r}, got {text!r}",
            )
        return [w == rb.closed for w in words]

    def transfer(
        self,
        open_channels: Iterable[int],
        close_channels: Iterable[int],
        *,
        clock: Clock,
        settle_s: float,
    ) -> None:
        """Break before make: open ``open_channels``, verify they read back open, wait
        ``settle_s`` seconds on ``clock``, close ``close_channels`` and verify them closed.

        Raises :class:`SafetyError` if a readback disagrees (nothing is closed when the
        opening could not be verified).
        """
        to_open = self._channels(open_channels)
        to_close = self._channels(close_channels)
        both = sorted(set(to_open) & set(to_close))
        if both:
            raise LimitError(f"{self.name}: channel(s) {both} both to open and to close")
        if not settle_s >= 0:
            raise LimitError(f"{self.name}: settle_s must be >= 0 s, got {settle_s!r}")
        if to_open:
            self.open(to_open)
            still = [c for c, on in zip(to_open, self.closed(to_open), strict=True) if on]
            if still:
                raise SafetyError(
                    f"{self.name}: channel(s) {still} still read closed after opening; "
                    f"not closing {to_close}"
                )
        clock.sleep(settle_s)
        if to_close:
            self.close(to_close)
            failed = [c for c, on in zip(to_close, self.closed(to_close), strict=True) if not on]
            if failed:
                raise SafetyError(f"{self.name}: channel(s) {failed} read open after closing")
        log.debug(
            "%s: opened %s, closed %s",
            self.name,
            to_open,
            to_close,
            extra={"instrument": self.name},
        )
